"""`eaves hosts`: the host configurations in the store."""

from __future__ import annotations

import argparse

from eaves.cli_options import add_db_option, add_json_option, check_json_path, json_to_stdout, write_json

HELP = "list the hosts (hostname + hardware fingerprint) in the store"
DOCUMENT_SCHEMA, DOCUMENT_VERSION = "eaves.hosts", 1


def add_arguments(p: argparse.ArgumentParser) -> None:
    add_json_option(p, "the list")
    add_db_option(p)


def run(args: argparse.Namespace) -> int:
    from eaves.store import Store

    check_json_path(args.json)
    store = Store(args.db)
    hosts = store.hosts()
    if args.json:
        write_json({"schema": DOCUMENT_SCHEMA, "schema_version": DOCUMENT_VERSION, "store": store.shown_url,
                    "hosts": [{"host_key": h.host_key, "hostname": h.hostname, "fingerprint": h.fingerprint,
                               "first_seen": h.first_seen, "last_seen": h.last_run, "runs": h.runs}
                              for h in hosts]}, args.json)
    if json_to_stdout(args.json):
        return 0
    from rich.table import Table

    from eaves.console import make_console
    from eaves.plain import plain

    table = Table(header_style="bold", box=None, pad_edge=False, title=f"Hosts in {plain(store.shown_url)}",
                  title_justify="left")
    for name in ("host key", "hostname", "runs", "last run (UTC)"):
        table.add_column(name)
    for h in hosts:
        table.add_row(plain(h.host_key), plain(h.hostname), str(h.runs),
                      h.last_run.strftime("%Y-%m-%d %H:%M") if h.last_run else "-")
    make_console().print(table)
    return 0
