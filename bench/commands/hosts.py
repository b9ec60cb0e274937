"""`eaves hosts`: the host configurations in the store."""

from __future__ import annotations

import argparse

from eaves.commands._render import make_console
from eaves.plain import plain
from rich.table import Table

from eaves.store import Store

HELP = "list the hosts (hostname + hardware fingerprint) in the store"


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--db", metavar="URL", help="store URL (default $EAVES_DB or sqlite:///results/eaves.db)")


def run(args: argparse.Namespace) -> int:
    store = Store(args.db)
    table = Table(header_style="bold", box=None, pad_edge=False, title=f"Hosts in {plain(store.shown_url)}",
                  title_justify="left")
    for name in ("host key", "hostname", "runs", "last run (UTC)"):
        table.add_column(name)
    for key, hostname, runs, last in store.hosts():
        table.add_row(plain(key), plain(hostname), str(runs), last.strftime("%Y-%m-%d %H:%M") if last else "-")
    make_console().print(table)
    return 0
