"""`eaves merge`: import the hosts and runs of another store file (read-only) into the store."""

from __future__ import annotations

import argparse
from pathlib import Path

from eaves.store import default_url, mask_url
from eaves.transfer import merge

NAME = "merge"
HELP = "import the hosts and runs of another eaves SQLite file; runs already present are skipped"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("file", metavar="FILE.db", type=Path, help="an eaves SQLite store to read from")
    parser.add_argument("--db", metavar="URL", default=None,
                        help="store URL to write to (default: $EAVES_DB or sqlite:///results/eaves.db)")


def run(args: argparse.Namespace) -> int:
    result = merge(args.file, args.db)
    print(f"{args.file} -> {mask_url(args.db or default_url())}: {result.copied} run(s) imported, "
          f"{result.already_there} already there")
    return 0
