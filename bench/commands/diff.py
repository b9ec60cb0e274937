"""`eaves diff A B`: two runs (or two hosts' newest runs) side by side, every change judged against noise."""

from __future__ import annotations

import argparse

from eaves.cli_options import add_db_option, add_json_option, check_json_path, json_to_stdout, run_ref, write_json
from eaves.compare import DEFAULT_THRESHOLD, LOST
from eaves.errors import EXIT_WORSE, InputError

HELP = "compare two runs (or hosts' newest runs): every ceiling and placed layer, judged against noise"
DOCUMENT_SCHEMA, DOCUMENT_VERSION = "eaves.diff", 2  # 2: verdicts gained | lost | held (unversioned before)


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("a", metavar="A", type=run_ref, help="before: run id, UUID or prefix, or a host key or hostname (its newest run)")
    p.add_argument("b", metavar="B", type=run_ref, help="after: same forms as A")
    add_json_option(p, "the comparison")
    p.add_argument("--allow-different-hosts", action="store_true",
                   help="compare runs of different hardware (refused by default)")
    p.add_argument("--threshold", metavar="PCT", default=str(DEFAULT_THRESHOLD * 100),
                   help=f"smallest change that counts, in percent (default {DEFAULT_THRESHOLD * 100:g})")
    add_db_option(p)


def run(args: argparse.Namespace) -> int:
    from eaves.cli_options import parse_percent
    from eaves.diff import diff_noise, diff_runs, resolve_ref
    from eaves.store import Store

    threshold = parse_percent(args.threshold, "--threshold")
    check_json_path(args.json)
    store = Store(args.db, create=False)
    hosts = store.hosts()
    ids = [resolve_ref(store, ref, hosts) for ref in (args.a, args.b)]
    before, after = (store.load_run(i) for i in ids)
    fa, fb = (store.host_fingerprint(r.summary.host_key) for r in (before, after))
    same = fa == fb
    if not same and not args.allow_different_hosts:
        raise InputError(f"{args.a} is host {before.summary.host_key} and {args.b} is host {after.summary.host_key}: "
                         "different hardware; pass --allow-different-hosts to compare them anyway")
    noise, layers_noise = diff_noise(store, before, after)
    result = diff_runs(before, after, same, threshold, noise=noise, layers_noise=layers_noise)
    if args.json:
        write_json(_document(result), args.json)
    if not json_to_stdout(args.json):
        _print(result)
    return EXIT_WORSE if result.worse else 0


def _document(d) -> dict:
    from eaves.verdicts import comparison_dict

    def meta(s):
        return {"id": s.id, "uuid": s.uuid, "host_key": s.host_key, "hostname": s.hostname, "kind": s.kind,
                "started_at": s.started_at, "tag": s.tag}

    doc = {"schema": DOCUMENT_SCHEMA, "schema_version": DOCUMENT_VERSION,
           "before": meta(d.before), "after": meta(d.after), "threshold_pct": d.threshold * 100,
           "same_hardware": d.same_hardware,
           "ceilings": [{"name": m.key.name(), **vars(m.key), "unit": m.unit, "present": m.present,
                         **(comparison_dict(m.comparison) if m.comparison else {})} for m in d.metrics],
           "worse": list(d.worse)}
    if d.layers:
        doc["layers"] = [{"layer": c.layer, "kind": c.kind, "dtype": c.dtype, "threads": c.threads,
                          "before_seconds": c.before_seconds, "after_seconds": c.after_seconds,
                          "counts_changed": c.counts_changed, "efficiency": comparison_dict(c.comparison)}
                         for c in d.layers.changes]
        doc["new_layers"], doc["vanished_layers"] = list(d.layers.new), list(d.layers.vanished)
    return doc


def _print(d) -> None:
    from rich.table import Table

    from eaves.console import make_console
    from eaves.plain import plain
    from eaves.units import format_figure
    from eaves.verdicts import change_cell, floor_cell, noise_summary, p_cell, print_layer_changes, verdict_cell

    console = make_console()
    for label, s in (("before:", d.before), ("after: ", d.after)):
        console.print(f"{label} run {s.id} {plain(s.uuid[:8])} {plain(s.host_key)} {s.started_at:%Y-%m-%d %H:%M}"
                      f"{' tag ' + plain(s.tag) if s.tag else ''}")
    if not d.same_hardware:
        console.print("[yellow]different hardware: differences are expected[/]")
    if d.metrics:
        t = Table(title=f"ceilings (a change counts beyond {d.threshold:.0%} and the run-to-run floor, and beyond "
                  "the samples' noise)", title_justify="left", header_style="bold")
        for col in ("ceiling", "before", "after", "change", "p", "floor", "verdict"):
            t.add_column(col, justify="left" if col in ("ceiling", "verdict") else "right")
        for m in d.metrics:
            c = m.comparison
            if c is None:
                t.add_row(plain(m.key.name()), "-", "-", "-", "-", "-", m.present)
                continue
            t.add_row(plain(m.key.name()), format_figure(c.before, m.unit), format_figure(c.after, m.unit),
                      change_cell(c), p_cell(c), floor_cell(c), verdict_cell(c))
        console.print(t)
        line = noise_summary(m.comparison for m in d.metrics)
        if line:
            console.print(line)
    if d.layers:
        print_layer_changes(console, d.layers)
    worse = d.worse
    console.print(f"[bold red]{LOST}: {len(worse)}[/]" if worse else f"nothing {LOST}")
