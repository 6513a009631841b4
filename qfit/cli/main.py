"""cli: argparse over the library. `qfit check` runs the whole job (qfit.cli.check); `qfit budget` the
memory part (qfit.cli.budget).

This module holds what every command shares at run time: the parser, the one error and exit policy (a
user error is one line on stderr and exit 2; an interrupt leaves nothing half-written and exits 130)
and the signal handlers; qfit.cli.arguments the arguments they share.
"""
from __future__ import annotations

import argparse
import os
import signal
import sys

from qfit import __version__
from qfit.cli import boundary
from qfit.errors import QfitError
from qfit.runtime import heap

EXIT_OK, EXIT_FAIL, EXIT_BAD_INPUT, EXIT_INTERRUPTED = 0, 1, 2, 130


def default_text(action: argparse.Action) -> str | None:
    """An option's default as --help and docs/cli.md state it (`required`, `off` for a switch, `none`
    when unset); None for positionals, -h and --version."""
    if not action.option_strings or action.default is argparse.SUPPRESS:
        return None
    if action.required:
        return "required"
    if isinstance(action, argparse._StoreTrueAction):
        return "off"
    if action.default is None:
        return "none"
    return str(action.default)


class _HelpFormatter(argparse.HelpFormatter):
    """--help names each option's default (the library's own, see `default_of`), unless its help
    already words it."""

    def _get_help_string(self, action):
        text = action.help or ""
        default = default_text(action)
        if default == "required":
            text += " (required)"
        elif default is not None and "default" not in text:
            text += f" (default: {default.replace('%', '%%')})"  # help strings are %-formatted
        return text


class _Parser(argparse.ArgumentParser):
    """argparse, but a usage error is one line on stderr and exit 2, and --help shows the defaults."""

    def __init__(self, *args, **kwargs):
        kwargs.setdefault("formatter_class", _HelpFormatter)
        super().__init__(*args, **kwargs)

    def error(self, message):
        raise QfitError(f"{self.prog}: {message}")


def _commands() -> dict:
    """Subcommand name -> its module (each has add_parser(sub) and run(args))."""
    from qfit.cli import budget, check, export
    return {"check": check, "budget": budget, "export": export}


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="qfit", description="int8 post-training quantization with a microcontroller fit verdict")
    parser.add_argument("--version", action="version", version=f"qfit {__version__}")
    sub = parser.add_subparsers(dest="command", parser_class=_Parser)
    for command in _commands().values():
        command.add_parser(sub)
    return parser


def _one_line(message: str) -> str:
    """Escape what would break the line or drive the terminal: a quoted value or file name can hold
    a line break (also \x85, \u2028) or an escape sequence."""
    return "".join(c if c.isprintable() else c.encode("unicode_escape").decode("ascii") for c in message)


def _on_signal(signum, frame):
    raise KeyboardInterrupt


def main(argv: list[str] | None = None) -> int:
    try:
        # A shell starting qfit as a background job (as CI does) ignores SIGINT for it; install the
        # handlers explicitly so an interrupt always ends the run cleanly. Inside the `try`, so a
        # signal that lands right after its handler is installed is still handled here; SIGINT
        # first, so a process that shows its SIGTERM handler has both.
        signal.signal(signal.SIGINT, _on_signal)
        signal.signal(signal.SIGTERM, _on_signal)
        boundary.guard_stdout()
        parser = build_parser()
        args = parser.parse_args(argv)
        boundary.check_options(args)
        commands = _commands()
        if args.command not in commands:
            raise QfitError(f"no command given: choose one of {', '.join(commands)} (qfit --help)")
        return commands[args.command].run(args)
    except QfitError as e:
        print(f"qfit: error: {_one_line(boundary.user_message(str(e)))}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        print("qfit: interrupted; no partial output was left", file=sys.stderr)
        return EXIT_INTERRUPTED


def run_as_program() -> None:
    """The `qfit` program (console script and `python -m qfit.cli`): main(), then exit with its code.

    After an interrupt the process ends with os._exit once the streams are flushed. Some CPython
    releases (seen with Debian's 3.11.2, not with 3.11.7) remember a KeyboardInterrupt raised inside
    a nested evaluation, such as an extension module's initialisation during an import, even when
    it was caught, and then end the process by SIGINT (status -2) instead of the 130 main returned.
    Everything qfit writes is complete or absent by then, so no exit handler is needed.

    The program owns its process, so it tunes the C heap for batch after batch of large buffers
    (qfit.runtime.heap); the library leaves a caller's process as it is."""
    heap.keep_freed_buffers()
    code = main()
    if code == EXIT_INTERRUPTED:
        for stream in (sys.stdout, sys.stderr):
            try:
                stream.flush()
            except (OSError, ValueError):
                pass
        os._exit(code)
    sys.exit(code)


if __name__ == "__main__":
    run_as_program()
