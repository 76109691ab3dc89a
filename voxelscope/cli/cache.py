"""``voxelscope cache info`` and ``voxelscope cache clear``: the voxel-major cache."""

from __future__ import annotations

import argparse

__all__ = ["register"]


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "cache",
        help="show or clear the voxel-major cache of compressed runs",
        description="The cache makes voxel time series of compressed runs instant.",
    )
    s = p.add_subparsers(dest="cache_command", metavar="ACTION", required=True)
    i = s.add_parser("info", help="list cached runs and their size")
    i.set_defaults(handler=run_info)
    c = s.add_parser("clear", help="delete every cached run")
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


def run_info(args: argparse.Namespace) -> int:
    from ..core import cache

    info = cache.cache_info()
    print(f"cache folder: {info.directory}")
    for e in info.entries:
        note = "  (stale: the source changed or is gone)" if e.stale else ""
        print(f"  {_human(e.size_bytes):>9}  {e.source}{note}")
    print(f"{len(info)} cached run(s), {_human(info.total_bytes)} in all")
    return 0


def run_clear(args: argparse.Namespace) -> int:
    from ..core import cache

    removed = cache.cache_clear(stale_only=args.stale)
    print(f"removed {len(removed)} cached run(s), {_human(removed.total_bytes)}")
    return 0
