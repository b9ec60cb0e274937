"""`eaves merge`: import the hosts and runs of another store file (read-only) into the store."""

from __future__ import annotations

import argparse
from pathlib import Path

from eaves.cli_options import add_db_option
from eaves.errors import EXIT_OK, EXIT_WORSE
from eaves.plain import visible
from eaves.store import default_url, mask_url
from eaves.transfer import merge

HELP = "import the hosts and runs of another eaves SQLite file; runs already present are skipped"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("file", metavar="FILE.db", type=Path, help="an eaves SQLite store to read from")
    add_db_option(parser)


def run(args: argparse.Namespace) -> int:
    """One line per run (copied, already present, refused and why); exit 1 if the store refused any."""
    result = merge(args.file, args.db)
    for uuid in result.copied:
        print(f"copied {uuid}")
    for uuid in result.already_there:
        print(f"already present {uuid}")
    for refusal in result.refused:
        print(f"refused {refusal.uuid} (host {visible(refusal.hostname)}): {visible(refusal.reason)}")
    print(f"{visible(args.file)} -> {mask_url(args.db or default_url())}: {len(result.copied)} run(s) imported, "
          f"{len(result.already_there)} already there, {len(result.refused)} refused")
    return EXIT_WORSE if result.refused else EXIT_OK
