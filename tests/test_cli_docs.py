"""docs/cli.md is generated from the argument parser (docs/make_cli_md.py) and --help states every
option's default: both are checked against argparse's own record of the options (the parser)."""
from __future__ import annotations

import argparse
import importlib.util
import pathlib

import pytest

from qfit.cli.main import build_parser, default_text

ROOT = pathlib.Path(__file__).resolve().parent.parent


def _generator():
    spec = importlib.util.spec_from_file_location("make_cli_md", ROOT / "docs" / "make_cli_md.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def _commands() -> dict[str, argparse.ArgumentParser]:
    parser = build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return dict(sub.choices)


def test_docs_cli_md_is_what_the_generator_writes_from_the_parser():
    # If this fails: run `python docs/make_cli_md.py` and commit docs/cli.md.
    assert (ROOT / "docs" / "cli.md").read_text(encoding="utf-8") == _generator().render()


@pytest.mark.parametrize("command", sorted(_commands()))
def test_every_option_of_every_command_is_listed_with_its_default(command):
    page = (ROOT / "docs" / "cli.md").read_text(encoding="utf-8")
    section = page.split(f"## qfit {command}\n", 1)[1].split("\n## ", 1)[0]
    for action in _commands()[command]._actions:
        if isinstance(action, argparse._HelpAction) or not action.option_strings:
            continue
        row = next(line for line in section.splitlines() if line.startswith(f"| `{action.option_strings[0]}`"))
        assert f"`{default_text(action)}`" in row


@pytest.mark.parametrize("command", sorted(_commands()))
def test_help_shows_every_options_default(command, capsys):
    parser = _commands()[command]
    with pytest.raises(SystemExit):
        parser.parse_args(["--help"])
    printed = "".join(capsys.readouterr().out.split())  # line wrapping aside
    for action in parser._actions:
        if isinstance(action, argparse._HelpAction) or not action.option_strings:
            continue
        shown = parser._get_formatter()._expand_help(action)
        assert "".join(shown.split()) in printed
        default = default_text(action)
        if default == "required":
            assert shown.endswith("(required)"), shown
        else:  # the default appended, or the help's own wording of it
            assert f"(default: {default})" in shown or "default" in (action.help or ""), shown
