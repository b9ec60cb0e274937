"""`eaves runs`: the runs in the store, newest first."""

from __future__ import annotations

import argparse

from eaves.cli_options import add_db_option, add_json_option, check_json_path, json_to_stdout, write_json
from eaves.units import parse_int_list

HELP = "list runs, newest first"
DOCUMENT_SCHEMA, DOCUMENT_VERSION = "eaves.runs", 1


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--host", help="host key or hostname")
    p.add_argument("--limit", default="50", help="at most this many (default 50)")
    add_json_option(p, "the list")
    add_db_option(p)


def run(args: argparse.Namespace) -> int:
    from eaves.store import Store

    limit = parse_int_list(args.limit, "--limit")[0]
    check_json_path(args.json)
    store = Store(args.db)
    runs = store.runs(host=args.host, limit=limit)
    if args.json:
        write_json(_document(store.shown_url, runs), args.json)
    if not json_to_stdout(args.json):
        from eaves.console import make_console
        from eaves.plain import plain
        from eaves.tables import runs_table

        make_console().print(runs_table(runs, f"Runs in {plain(store.shown_url)}"))
    return 0


def _document(store: str, runs) -> dict:
    """Every run listed, newest first: what the table shows, whole (full UUID, times in ISO 8601 UTC)."""
    return {"schema": DOCUMENT_SCHEMA, "schema_version": DOCUMENT_VERSION, "store": store,
            "runs": [{"id": r.id, "uuid": r.uuid, "host_key": r.host_key, "hostname": r.hostname, "kind": r.kind,
                      "status": r.status, "started_at": r.started_at, "ended_at": r.ended_at,
                      "seconds": (r.ended_at - r.started_at).total_seconds() if r.ended_at else None,
                      "tag": r.tag, "note": r.note, "git_describe": r.git_describe,
                      "eaves_version": r.eaves_version, "figures": r.n_figures, "layers": r.n_placements}
                     for r in runs]}
