"""Command line: parse arguments, call one command module, turn expected failures into one line."""

from __future__ import annotations

import argparse
import importlib
import sys
from typing import Optional, Sequence

from eaves import __version__
from eaves.errors import EXIT_INPUT, EXIT_INTERRUPTED, EavesError

# Each module in eaves.commands defines HELP, add_arguments(parser) and run(args) -> int.
COMMANDS = ("survey", "hosts", "runs", "show", "place", "profile-torch", "diff", "trend", "gate", "report",
            "db", "push", "merge")


class _Parser(argparse.ArgumentParser):
    """argparse, but usage errors are one line and exit code 2 like every other bad input."""

    def error(self, message: str) -> None:  # type: ignore[override]
        raise EavesError(f"{self.prog}: {message}", EXIT_INPUT)


def build_parser(only: Optional[str] = None) -> argparse.ArgumentParser:
    """The whole parser, or with `only` just that command's (so a command imports only its own
    module: numba, matplotlib and the rest load when a command needs them)."""
    parser = _Parser(prog="eaves", description="Measure this host's ceilings and place layers under them.")
    parser.add_argument("--version", action="version", version=f"eaves {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for name in COMMANDS if only is None else (only,):
        module = importlib.import_module(f"eaves.commands.{name.replace('-', '_')}")
        p = sub.add_parser(name, help=module.HELP, description=module.HELP)
        module.add_arguments(p)
        p.set_defaults(_run=module.run)
    return parser


def main(argv: Optional[Sequence[str]] = None) -> int:
    """Entry point of the `eaves` command; returns the exit code."""
    try:
        words = list(sys.argv[1:] if argv is None else argv)
        chosen = next((w for w in words if not w.startswith("-")), None)
        parser = build_parser(chosen if chosen in COMMANDS else None)
        args = parser.parse_args(words)
        if not getattr(args, "_run", None):
            parser.print_help()
            return EXIT_INPUT
        return int(args._run(args) or 0)
    except EavesError as err:
        print(f"eaves: error: {err}", file=sys.stderr)
        return err.exit_code
    except KeyboardInterrupt:
        print("eaves: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED
