"""Command-line front door: ``voxelscope <command> ...``.

Every command calls :mod:`voxelscope.core`; none re-does its maths. Only ``view`` and
``demo`` (and ``voxelscope`` with no command, which opens an empty window) import Qt, and
only inside their handlers, so ``fit``, ``map``, ``report`` and ``cache`` never load it.

Errors the user can fix print one line, ``voxelscope: error: ...``, and exit with code 2.
"""

from __future__ import annotations

import argparse
import os
import sys
from collections.abc import Sequence

from .. import __version__
from ..core.errors import VoxelscopeError

__all__ = ["build_parser", "main"]


#: Command name -> the module that registers it. ``main`` registers only the module of the
#: command being run (start-up stays short); anything else builds the full parser.
_COMMAND_MODULES = {
    "fit": "fit",
    "map": "map",
    "report": "report",
    "view": "view",
    "demo": "view",
    "cache": "cache",
}


def _parser_for(command: str) -> argparse.ArgumentParser:
    """A parser with only ``command`` registered (its help and errors are the same)."""
    parser = _top_parser()
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    module = __import__(f"{__package__}.{_COMMAND_MODULES[command]}", fromlist=["register"])
    module.register(sub)
    _once_each(parser)
    return parser


def _top_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="voxelscope",
        description=(
            "Inspect a first-level fMRI model voxel by voxel. Run without a command to open "
            "an empty window. Research software: not for clinical diagnosis."
        ),
    )
    parser.add_argument("--version", action="version", version=f"voxelscope {__version__}")
    return parser


def build_parser() -> argparse.ArgumentParser:
    """The argument parser with every subcommand registered."""
    from . import cache, fit, view

    parser = _top_parser()
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    modules = [fit, view, cache]
    for name in ("map", "report"):
        try:
            modules.insert(1, __import__(f"{__package__}.{name}", fromlist=["register"]))
        except ImportError:  # pragma: no cover - optional while a command is being built
            pass
    for m in modules:
        m.register(sub)
    _once_each(parser)
    return parser


class _StoreOnce(argparse._StoreAction):
    """A single-valued option: giving it twice is an error, not "the last one wins"."""

    def __call__(self, parser, namespace, values, option_string=None):
        seen = namespace.__dict__.setdefault("_given_options", set())
        if self.dest in seen:
            raise argparse.ArgumentError(
                self, f"given more than once; give {option_string or self.dest} once"
            )
        seen.add(self.dest)
        super().__call__(parser, namespace, values, option_string)


def _once_each(parser: argparse.ArgumentParser) -> None:
    """Make every single-valued option of ``parser`` and its subcommands an error when repeated."""
    for action in parser._actions:
        if type(action) is argparse._StoreAction and action.option_strings:
            action.__class__ = _StoreOnce
        if isinstance(action, argparse._SubParsersAction):
            for sub in dict.fromkeys(action.choices.values()):
                _once_each(sub)


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the process exit code."""
    argv = list(sys.argv[1:] if argv is None else argv)
    if argv == ["--version"]:  # answered before any command module (and numpy) is imported
        print(f"voxelscope {__version__}")
        return 0
    if not argv:
        from .view import open_empty_window

        return open_empty_window()
    if argv[0] in _COMMAND_MODULES:
        parser = _parser_for(argv[0])
    else:
        parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "handler", None):
        parser.print_help()
        return 2
    try:
        return int(args.handler(args) or 0)
    except VoxelscopeError as exc:
        print(f"voxelscope: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("voxelscope: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        return 0
    except Exception as exc:
        if os.environ.get("VOXELSCOPE_DEBUG"):
            raise
        print(
            f"voxelscope: internal error: {exc.__class__.__name__}: {exc} "
            "(set VOXELSCOPE_DEBUG=1 for details and please report it)",
            file=sys.stderr,
        )
        return 1


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
