"""``--help`` describes every argument of every command with its default, and its examples parse.

The expectations are argparse's own model of the parser (common practice: the actions a
parser holds are exactly what ``--help`` can show), walked rather than listed by hand, so
an option added later without a help text fails here.
"""

from __future__ import annotations

import argparse
import os
import shlex
import subprocess
import sys
from pathlib import Path

import pytest

from nextword.cli import build_parser, main

ROOT = Path(__file__).resolve().parent.parent


def commands() -> dict[str, argparse.ArgumentParser]:
    sub = next(a for a in build_parser()._actions if isinstance(a, argparse._SubParsersAction))
    return dict(sub.choices)


COMMANDS = sorted(commands())


def test_every_command_is_covered() -> None:
    assert {"train", "suggest", "info", "eval", "split", "tune", "personal", "prune", "export", "serve", "live"} <= set(COMMANDS)


@pytest.mark.parametrize("name", COMMANDS)
def test_help_exits_zero_and_shows_examples(name: str, capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as stop:
        main([name, "--help"])
    assert stop.value.code == 0
    out = capsys.readouterr().out
    assert out.startswith(f"usage: nextword {name}") and "\nexamples:\n  nextword " + name in out


@pytest.mark.parametrize("name", COMMANDS)
def test_every_argument_has_help_stating_its_default(name: str) -> None:
    parser = commands()[name]
    formatter = parser._get_formatter()
    for action in parser._actions:
        if isinstance(action, argparse._HelpAction):
            continue
        label = "/".join(action.option_strings) or action.dest
        assert action.help and action.help.strip(), f"{name} {label}: no help text"
        shown = formatter._expand_help(action)  # what --help prints, defaults filled in
        takes_value = action.option_strings and action.nargs != 0
        if takes_value and not action.required:
            assert "default" in shown.lower(), f"{name} {label}: help does not state the default: {shown!r}"
            if action.default not in (None, "", argparse.SUPPRESS):
                d = action.default
                forms = {" ".join(map(str, d))} if isinstance(d, list) else {str(d), f"{d:g}" if isinstance(d, float) else str(d)}
                assert any(f in shown for f in forms), f"{name} {label}: default {d!r} not shown in {shown!r}"


@pytest.mark.parametrize("name", COMMANDS)
def test_every_epilog_example_parses(name: str) -> None:
    epilog = commands()[name].epilog or ""
    examples = [line.strip() for line in epilog.splitlines() if line.strip().startswith("nextword ")]
    assert examples, f"{name}: no example in its --help"
    for line in examples:
        argv = shlex.split(line)[1:]
        args = build_parser().parse_args(argv)  # raises on a bad example
        assert args.command == name, line


def test_top_level_help_from_a_shell() -> None:
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    r = subprocess.run([sys.executable, "-m", "nextword", "--help"], capture_output=True, text=True, env=env)
    assert r.returncode == 0 and r.stderr == ""
    for name in COMMANDS:
        assert f"    {name}" in r.stdout
