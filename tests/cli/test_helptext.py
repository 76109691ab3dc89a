"""Every command's help: each option described, examples at the end (issue 17 item 10)."""

from __future__ import annotations

import argparse

import pytest

from voxelscope.cli import build_parser, main
from voxelscope.cli.helptext import EXAMPLES


def _parsers() -> dict[str, argparse.ArgumentParser]:
    """Every parser by its command name ("voxelscope", "fit", ..., "cache clear")."""
    top = build_parser()
    out = {"voxelscope": top}

    def walk(parser: argparse.ArgumentParser, prefix: str) -> None:
        for action in parser._actions:
            if isinstance(action, argparse._SubParsersAction):
                for name, sub in action.choices.items():
                    full = f"{prefix} {name}".strip()
                    out[full] = sub
                    walk(sub, full)

    walk(top, "")
    return out


def test_every_command_has_examples_and_every_option_a_description():
    parsers = _parsers()
    assert {"fit", "map", "report", "view", "demo", "cache", "cache info", "cache clear"} <= set(
        parsers
    )
    for name, parser in parsers.items():
        assert parser.epilog == EXAMPLES[name], name
        assert parser.epilog.startswith("example"), name
        for action in parser._actions:
            if isinstance(action, argparse._SubParsersAction):
                continue
            if action.help == argparse.SUPPRESS:  # replaced options: they say so when used
                continue
            assert action.help and action.help.strip(), (name, action.dest)


@pytest.mark.parametrize("command", ["fit", "map", "report", "view", "demo", "cache"])
def test_help_ends_with_examples_that_keep_their_lines(command, capsys):
    with pytest.raises(SystemExit) as ended:
        main([command, "--help"])
    assert ended.value.code == 0
    text = capsys.readouterr().out.rstrip("\n")
    tail = EXAMPLES[command].splitlines()
    assert text.splitlines()[-len(tail) :] == tail
    for line in tail[1:]:
        assert line.startswith("  voxelscope ")


def test_examples_parse():
    """The example commands are valid command lines (parsed, not run)."""
    import shlex

    parser = build_parser()
    for text in EXAMPLES.values():
        for line in text.splitlines()[1:]:
            argv = shlex.split(line)[1:]
            if argv:
                parser.parse_args(argv)
