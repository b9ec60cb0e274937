"""Command line: parse arguments, call one command module, turn expected failures into one line."""

from __future__ import annotations

import argparse
import importlib
import re
import sys
from typing import Optional, Sequence

from eaves import __version__, interrupts
from eaves.errors import EXIT_INPUT, EXIT_INTERRUPTED, EavesError

INTERRUPTED = "eaves: interrupted"  # the one message of SIGINT and SIGTERM alike
_NEGATIVE = re.compile(r"^-[0-9.]")  # a value such as -5GiB or -3s, not an option
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
    """Entry point of the `eaves` command; returns the exit code. SIGTERM is Ctrl-C from the first
    line on: both end in "eaves: interrupted" and exit 130, whatever the command was doing."""
    previous = interrupts.install()
    try:
        try:
            return _run(list(sys.argv[1:] if argv is None else argv))
        except EavesError as err:
            from eaves.plain import visible  # typed and stored strings in the message: no terminal controls

            print(f"eaves: error: {visible(err, keep_newlines=True)}", file=sys.stderr)
            return err.exit_code
    except KeyboardInterrupt:
        interrupts.hold()  # a second signal must not cut the message short
        print(INTERRUPTED, file=sys.stderr)
        return EXIT_INTERRUPTED
    finally:
        interrupts.hold()  # from here on a signal must not raise into the code that follows
        if argv is None:  # the process itself: a signal from here to the exit still means 130
            interrupts.exit_on_stop(EXIT_INTERRUPTED, INTERRUPTED)
        else:  # called in-process (tests): leave the caller's handlers as they were
            interrupts.restore(previous)


def _run(words: list[str]) -> int:
    chosen = next((w for w in words if not w.startswith("-")), None)
    parser = build_parser(chosen if chosen in COMMANDS else None)
    args = parser.parse_args(attach_negative_values(words, parser))
    if not getattr(args, "_run", None):
        parser.print_help()
        return EXIT_INPUT
    return int(args._run(args) or 0)


def attach_negative_values(words: list[str], parser: argparse.ArgumentParser) -> list[str]:
    """`--max-memory -5GiB` as `--max-memory=-5GiB`: argparse takes any word starting with '-' (other
    than a plain number) for an option, and would say "expected one argument" instead of reading the value,
    which then gets its own one-line error naming the option."""
    takes_value = _options_with_one_value(parser)
    out: list[str] = []
    for word in words:
        if out and out[-1] in takes_value and _NEGATIVE.match(word):
            out[-1] = f"{out[-1]}={word}"
        else:
            out.append(word)
    return out


def _options_with_one_value(parser: argparse.ArgumentParser) -> set[str]:
    """Option strings (of the parser and its commands) that take exactly one value."""
    found: set[str] = set()
    for action in parser._actions:  # argparse keeps no public list of a parser's actions
        if isinstance(action, argparse._SubParsersAction):
            for sub in action.choices.values():
                found |= _options_with_one_value(sub)
        elif action.option_strings and action.nargs is None:
            found.update(action.option_strings)
    return found
