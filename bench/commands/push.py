"""`eaves push`: send the runs kept in the local spool to the store."""

from __future__ import annotations

import argparse
from pathlib import Path

from eaves.store import default_url, mask_url
from eaves.transfer import default_spool, push

NAME = "push"
HELP = "send runs kept in the local spool (when the store was unreachable) to the store"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--db", metavar="URL", default=None,
                        help="store URL (default: $EAVES_DB or sqlite:///results/eaves.db)")
    parser.add_argument("--spool", metavar="PATH", type=Path, default=None,
                        help="spool file (default: $EAVES_SPOOL or results/spool.db)")


def run(args: argparse.Namespace) -> int:
    spool = args.spool or default_spool()
    if not spool.exists():
        print(f"no spool at {spool}: nothing to push")
        return 0
    result = push(args.db, spool)
    print(f"{spool} -> {mask_url(args.db or default_url())}: {result.copied} run(s) sent, "
          f"{result.already_there} already there, {result.removed_from_source} removed from the spool")
    return 0
