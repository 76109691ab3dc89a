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
    print(f"cache folder: {info['directory']}")
    entries = info.get("entries", [])
    for e in entries:
        print(f"  {_human(e.get('size_bytes', 0)):>9}  {e.get('source', '?')}")
    print(f"{len(entries)} cached run(s), {_human(info.get('total_bytes', 0))} in all")
    return 0


def run_clear(args: argparse.Namespace) -> int:
    from ..core import cache

    n = cache.cache_clear()
    print(f"removed {n} cached run(s)")
    return 0
