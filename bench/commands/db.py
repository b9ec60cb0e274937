"""`eaves db`: show or migrate the schema version of a store."""

from __future__ import annotations

import argparse

from eaves.cli_options import add_db_option
from eaves.models import SCHEMA_REVISION
from eaves.store import Store, default_url

HELP = "show the schema version of a store, or migrate it to the one this eaves uses"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("action", choices=("version", "upgrade"),
                        help="version: print the store's schema version; upgrade: migrate it")
    add_db_option(parser)


def run(args: argparse.Namespace) -> int:
    url = args.db or default_url()
    store = Store(url, create=args.action == "upgrade", check_schema=False)
    if args.action == "version":
        revision = store.schema_revision()
        state = "current" if revision == SCHEMA_REVISION else "needs attention"
        print(f"{store.shown_url}: schema {revision or 'none'} ({state}; this eaves uses {SCHEMA_REVISION})")
        return 0
    before, after = store.upgrade_schema()
    if before == after:
        print(f"{store.shown_url}: schema {after}, already current")
    else:
        print(f"{store.shown_url}: schema {before or 'none'} -> {after}")
    return 0
