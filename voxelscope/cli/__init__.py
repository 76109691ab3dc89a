"""Command-line front door: ``voxelscope <command> ...``.

Every command calls :mod:`voxelscope.core`; none re-does its maths. Only ``view`` and
``demo`` (and ``voxelscope`` with no command, which opens an empty window) import Qt, and
only inside their handlers, so ``fit``, ``map``, ``report``, ``sweep`` and ``cache`` never load
it. ``sweep`` imports Dask only inside its handler.

Errors the user can fix print one line, ``voxelscope: error: ...``, and exit with code 2.

Terminal hygiene: everything a command prints passes a filter that removes control
characters (terminal escape sequences, bidirectional overrides) that file content such as
condition names could carry; library log lines and Python warnings (numpy's
RuntimeWarnings, nibabel's header notes) are kept off stderr unless ``VOXELSCOPE_DEBUG``
is set; each command runs in a fresh scope of noted inputs, so no output of the command
can replace one of its inputs (:mod:`voxelscope.core.outputs`).
"""

from __future__ import annotations

import argparse
import contextlib
import os
import sys
from collections.abc import Iterator, Sequence

from .. import __version__
from ..core.errors import VoxelscopeError

__all__ = ["build_parser", "main", "quiet_libraries", "terminal_safe"]

#: Longest error line printed (a message that quotes file content is cut here).
MAX_ERROR_CHARS = 1000

# C0 controls except tab, newline and carriage return (progress lines use it), DEL, C1
# controls and the bidirectional overrides and isolates.
_STRIP = {c: None for c in [*range(0x00, 0x09), 0x0B, 0x0C, *range(0x0E, 0x20), 0x7F]}
_STRIP.update({c: None for c in range(0x80, 0xA0)})
_STRIP.update({c: None for c in [*range(0x202A, 0x202F), *range(0x2066, 0x206A)]})


def terminal_safe(text: str) -> str:
    """``text`` without control characters a terminal would act on.

    >>> terminal_safe("tone\x1b[2J\u202e")
    'tone[2J'
    """
    return str(text).translate(_STRIP)


class _SafeStream:
    """A text stream wrapper that writes :func:`terminal_safe` text."""

    def __init__(self, stream) -> None:
        self._stream = stream

    def write(self, text: str) -> int:
        self._stream.write(terminal_safe(text))
        return len(text)

    def __getattr__(self, name: str):
        return getattr(self._stream, name)


@contextlib.contextmanager
def quiet_libraries() -> Iterator[None]:
    """Keep library log lines and Python warnings off stderr (unless VOXELSCOPE_DEBUG)."""
    if os.environ.get("VOXELSCOPE_DEBUG"):
        yield
        return
    import logging
    import warnings

    nib_logger = logging.getLogger("nibabel")
    old_level = nib_logger.level
    old_last_resort = logging.lastResort
    nib_logger.setLevel(logging.CRITICAL + 1)
    logging.lastResort = logging.NullHandler()  # unconfigured loggers stay silent
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            yield
    finally:
        nib_logger.setLevel(old_level)
        logging.lastResort = old_last_resort


def _error_line(exc: object) -> str:
    text = " ".join(str(exc).split())
    if len(text) > MAX_ERROR_CHARS:
        text = text[:MAX_ERROR_CHARS] + "…"
    return text


#: Command name -> the module that registers it. ``main`` registers only the module of the
#: command being run (start-up stays short); anything else builds the full parser.
_COMMAND_MODULES = {
    "fit": "fit",
    "map": "map",
    "report": "report",
    "view": "view",
    "demo": "view",
    "cache": "cache",
    "sweep": "sweep",
}


def _parser_for(command: str) -> argparse.ArgumentParser:
    """A parser with only ``command`` registered (its help and errors are the same)."""
    parser = _top_parser()
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    module = __import__(f"{__package__}.{_COMMAND_MODULES[command]}", fromlist=["register"])
    module.register(sub)
    _once_each(parser)
    return parser


class _OneLineParser(argparse.ArgumentParser):
    """Argument errors as one line (``voxelscope: error: ...``, exit 2), not usage + error."""

    def error(self, message: str) -> None:  # type: ignore[override]
        text = _error_line(Exception(message))
        if len(text) > 300:
            text = text[:300] + "…"
        self.exit(2, f"voxelscope: error: {text} (see {self.prog} --help)\n")


def _top_parser() -> argparse.ArgumentParser:
    from .helptext import help_args

    parser = _OneLineParser(
        prog="voxelscope",
        **help_args("voxelscope"),
        description=(
            "Inspect a first-level fMRI model voxel by voxel. Run without a command to open "
            "an empty window. Research software: not for clinical diagnosis."
        ),
    )
    parser.add_argument("--version", action="version", version=f"voxelscope {__version__}")
    return parser


def build_parser() -> argparse.ArgumentParser:
    """The argument parser with every subcommand registered."""
    from importlib import import_module

    parser = _top_parser()
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    # every command is always there: a module that fails to import is a bug, never hidden
    for name in ("fit", "report", "map", "sweep", "view", "cache"):
        import_module(f"{__package__}.{name}").register(sub)
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

        with quiet_libraries():
            return open_empty_window()
    from ..core.outputs import input_scope

    out, err = sys.stdout, sys.stderr
    sys.stdout, sys.stderr = _SafeStream(out), _SafeStream(err)  # type: ignore[assignment]
    try:
        with quiet_libraries(), input_scope():
            return _run(argv)
    finally:
        sys.stdout, sys.stderr = out, err


#: Commands short enough to run BLAS on one thread from the start (see core/blas.py).
_ONE_BLAS_THREAD = ("fit",)


def _run(argv: list[str]) -> int:
    if argv[0] in _ONE_BLAS_THREAD:
        from ..core.blas import one_thread_process

        one_thread_process()
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
        from .remedies import CLI_REMEDIES

        for line in getattr(exc, "problems", None) or [exc]:  # a session: one line each
            text = line.phrase(CLI_REMEDIES) if isinstance(line, VoxelscopeError) else line
            print(f"voxelscope: error: {_error_line(text)}", file=sys.stderr)
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
            f"voxelscope: internal error: {exc.__class__.__name__}: {_error_line(exc)} "
            "(set VOXELSCOPE_DEBUG=1 for details and please report it)",
            file=sys.stderr,
        )
        return 1


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
