"""Words of the command line: examples at the end of each command's ``--help`` (plain text,
no imports: start-up). Counts with the right plural are :func:`voxelscope.core.numfmt.count`.

>>> print(EXAMPLES["cache"].splitlines()[0])
examples:
"""

from __future__ import annotations

import argparse

__all__ = ["EXAMPLES", "ExamplesFormatter", "help_args"]

_RUN = "sub-01_task-motor_bold.nii.gz"

#: Command -> the epilog of its help: one or two commands a user can copy.
EXAMPLES = {
    "voxelscope": (f"examples:\n  voxelscope demo\n  voxelscope fit {_RUN} --mm -26 -10 50"),
    "fit": (
        "examples:\n"
        f"  voxelscope fit {_RUN} --mm -26 -10 50\n"
        "  voxelscope fit run-1_bold.nii.gz run-2_bold.nii.gz --voxel 13 25 28 --checks"
    ),
    "map": (
        "examples:\n"
        f"  voxelscope map {_RUN} --contrast 'tap - tone' -o tap_t.nii.gz\n"
        f"  voxelscope map {_RUN} -o t.nii.gz --clusters c.tsv --threshold 3.5"
    ),
    "report": (
        "examples:\n"
        f"  voxelscope report {_RUN} --mm -26 -10 50 -o report\n"
        f"  voxelscope report {_RUN} --marks marks.tsv -o meeting"
    ),
    "view": (
        "examples:\n"
        f"  voxelscope view {_RUN} --anatomy sub-01_T1w.nii.gz\n"
        f"  voxelscope view {_RUN} --screenshot window.png --size 1280x800"
    ),
    "demo": (
        "examples:\n"
        "  voxelscope demo\n"
        "  voxelscope demo --show --screenshot show.png --size 1280x720"
    ),
    "sweep": (
        "examples:\n"
        "  voxelscope sweep study -o sweep --task motor\n"
        "  voxelscope sweep study -o sweep --scheduler tcp://10.0.0.5:8786"
    ),
    "cache": ("examples:\n  voxelscope cache info\n  voxelscope cache clear --stale"),
    "cache info": "example:\n  voxelscope cache info",
    "cache clear": (f"examples:\n  voxelscope cache clear {_RUN}\n  voxelscope cache clear"),
}


class ExamplesFormatter(argparse.HelpFormatter):
    """argparse's formatter, except that the examples keep their lines (one command each)."""

    def _fill_text(self, text: str, width: int, indent: str) -> str:
        if text.startswith("example"):
            return "".join(indent + line for line in text.splitlines(keepends=True))
        return super()._fill_text(text, width, indent)


def help_args(command: str) -> dict:
    """``add_parser`` keyword arguments that end the command's help with its examples."""
    return {"epilog": EXAMPLES[command], "formatter_class": ExamplesFormatter}
