"""`eaves runs`: the runs in the store, newest first."""

from __future__ import annotations

import argparse

from eaves.commands._render import make_console
from eaves.plain import plain

from eaves.store import Store
from eaves.tables import runs_table
from eaves.units import parse_int_list

HELP = "list runs, newest first"


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--host", help="host key or hostname")
    p.add_argument("--limit", default="50", help="at most this many (default 50)")
    p.add_argument("--db", metavar="URL", help="store URL (default $EAVES_DB or sqlite:///results/eaves.db)")


def run(args: argparse.Namespace) -> int:
    limit = parse_int_list(args.limit, "--limit")[0]
    store = Store(args.db)
    runs = store.runs(host=args.host, limit=limit)
    make_console().print(runs_table(runs, f"Runs in {plain(store.shown_url)}"))
    return 0
