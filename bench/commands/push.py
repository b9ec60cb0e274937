"""`eaves push`: send the runs kept in the local spool to the store; quarantine what it refuses."""

from __future__ import annotations

import argparse
from pathlib import Path

from eaves.cli_options import add_db_option
from eaves.errors import EXIT_OK, EXIT_WORSE
from eaves.plain import visible
from eaves.store import default_url, mask_url
from eaves.transfer import default_spool, push

HELP = "send runs kept in the local spool (when the store was unreachable) to the store"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    add_db_option(parser)
    parser.add_argument("--spool", metavar="PATH", type=Path, default=None,
                        help="spool file (default: $EAVES_SPOOL or results/spool.db)")
    parser.add_argument("--retry-quarantined", action="store_true",
                        help="also send the runs the store refused before (e.g. after fixing the store)")


def run(args: argparse.Namespace) -> int:
    """Exit 0 when every sendable run was sent, 1 when this push quarantined a run; the quarantine
    is listed on every push while it holds anything (those earlier runs alone do not make it 1)."""
    spool = args.spool or default_spool()
    if not spool.exists():
        print(f"no spool at {visible(spool)}: nothing to push")
        return EXIT_OK
    result = push(args.db, spool, retry_quarantined=args.retry_quarantined)
    for uuid in result.copied:
        print(f"sent {uuid}")
    for refusal in result.refused:
        print(f"refused {refusal.uuid} (host {visible(refusal.hostname)}): {visible(refusal.reason)}")
    print(f"{visible(spool)} -> {mask_url(args.db or default_url())}: {len(result.copied)} run(s) sent, "
          f"{len(result.already_there)} already there, {result.removed_from_source} removed from the spool, "
          f"{len(result.refused)} quarantined")
    if result.quarantined:
        print(f"quarantine of {visible(spool)}: {len(result.quarantined)} run(s) the store refused, kept and not sent "
              f"again (`eaves push --retry-quarantined` tries them once more):")
        for q in result.quarantined:
            print(f"  {q.uuid}  host {visible(q.hostname)}  started {q.started_at:%Y-%m-%d %H:%M:%S} UTC  "
                  f"refused {q.refused_at:%Y-%m-%d %H:%M:%S} UTC: {visible(q.reason)}")
    return EXIT_WORSE if result.refused else EXIT_OK
