"""`eaves show RUN`: one stored run's ceilings, as tables or as the JSON document."""

from __future__ import annotations

import argparse

from eaves.cli_options import add_db_option, add_json_option, check_json_path, json_to_stdout, run_ref, write_json

HELP = "show a stored run (id, UUID or UUID prefix, or 'latest')"


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("run", type=run_ref, help="run id, UUID, UUID prefix, or latest")
    add_json_option(p, "the run's document (docs/json.md)")
    add_db_option(p)


def run(args: argparse.Namespace) -> int:
    from eaves.noise import steadiness
    from eaves.store import Store

    check_json_path(args.json)
    store = Store(args.db)
    if args.run == "latest":
        from eaves.errors import InputError

        run_id = store.latest_complete_run()
        if run_id is None:
            raise InputError(f"no complete run in {store.shown_url}: run `eaves survey` first")
    else:
        run_id = store.resolve_run(args.run)
    stored = store.load_run(run_id)
    s = stored.summary
    steady = steadiness(store, s.host_key, s.kind, until=s.started_at) if stored.figures else {}
    if args.json:
        from eaves.document import run_document

        meta = {"uuid": s.uuid, "host_key": s.host_key, "hostname": s.hostname, "kind": s.kind, "status": s.status,
                "started_at": s.started_at, "ended_at": s.ended_at, "tag": s.tag, "note": s.note,
                "git_describe": s.git_describe, "eaves_version": s.eaves_version, "params": stored.params}
        write_json(run_document(meta, stored.host_facts, stored.figures, stored.placements, steady), args.json)
    if json_to_stdout(args.json):
        return 0
    from eaves.console import make_console, print_ceilings
    from eaves.plain import plain

    console = make_console()
    console.print(f"run {s.id} {plain(s.uuid)} on {plain(s.host_key)}: {plain(s.kind)}, {plain(s.status)}, "
                  f"started {s.started_at:%Y-%m-%d %H:%M:%S} UTC"
                  + (f", tag {plain(s.tag)}" if s.tag else "")
                  + (f", git {plain(s.git_describe)}" if s.git_describe else ""))
    if s.note:
        console.print(f"note: {plain(s.note)}")
    print_ceilings(console, stored.figures, stored.params.get("levels", {}), s.uuid[:8],
                   stored.params.get("failures") or (), steady)
    return 0
