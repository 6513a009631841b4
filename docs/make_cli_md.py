"""Write docs/cli.md from qfit's argument parser: every option of every command, with its default.

    python docs/make_cli_md.py            # rewrite docs/cli.md
    python docs/make_cli_md.py --check    # exit 1 when docs/cli.md differs from the parser

tests/test_cli_docs.py compares the file with `render()`, so the page cannot drift from the parser.
"""
from __future__ import annotations

import argparse
import pathlib
import sys

from qfit.cli.main import build_parser, default_text

OUT = pathlib.Path(__file__).resolve().parent / "cli.md"


def _cell(text: str) -> str:
    return " ".join(text.split()).replace("|", "\\|")


def _subcommands(parser: argparse.ArgumentParser) -> dict[str, argparse.ArgumentParser]:
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            return dict(action.choices)
    return {}


def _help_of(parser: argparse.ArgumentParser) -> dict[str, str]:
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            return {choice.dest: choice.help or "" for choice in action._choices_actions}
    return {}


def _expanded_help(parser: argparse.ArgumentParser, action: argparse.Action) -> str:
    """The help text as --help prints it before the default is added (%-formatted, as argparse does)."""
    return (action.help or "") % dict(vars(action), prog=parser.prog)


def _argument(action: argparse.Action) -> str:
    if not action.option_strings:
        return f"`{action.dest.upper()}`"
    if action.nargs == 0:
        return ""
    return f"`{action.metavar or action.dest.upper()}`"


def render() -> str:
    parser = build_parser()
    lines = ["# Command-line options", "",
             "Generated from qfit's argument parser by `docs/make_cli_md.py`; do not edit by hand",
             "(`tests/test_cli_docs.py` fails when this page and the parser differ). `qfit COMMAND --help`",
             "prints the same options with the same defaults.", "",
             "Defaults: `required` means the option must be given; `off` is a switch that is not set;",
             "`none` means unset (the help text says what happens then).", ""]
    helps = _help_of(parser)
    for name, sub in _subcommands(parser).items():
        lines += [f"## qfit {name}", "", _cell(helps.get(name, "")), "",
                  "| option | argument | default | what it does |", "|---|---|---|---|"]
        for action in sub._actions:
            if isinstance(action, argparse._HelpAction):
                continue
            option = ", ".join(f"`{o}`" for o in action.option_strings) or "(positional)"
            default = default_text(action)
            lines.append(f"| {option} | {_argument(action)} | {'' if default is None else f'`{default}`'} | "
                         f"{_cell(_expanded_help(sub, action))} |")
        lines.append("")
    return "\n".join(lines)


def main(argv: list[str]) -> int:
    text = render()
    if "--check" in argv:
        same = OUT.exists() and OUT.read_text(encoding="utf-8") == text
        print("docs/cli.md is up to date" if same else "docs/cli.md differs from the parser: run docs/make_cli_md.py")
        return 0 if same else 1
    OUT.write_text(text, encoding="utf-8")
    print(f"wrote {OUT}")
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
