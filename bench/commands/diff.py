"""`eaves diff A B`: two runs (or two hosts' newest runs) side by side, every change judged against noise."""

from __future__ import annotations

import argparse
import json
import sys

from eaves.compare import DEFAULT_THRESHOLD
from eaves.errors import EXIT_WORSE, InputError
from eaves.commands._refs import run_ref

HELP = "compare two runs (or hosts' newest runs): every ceiling and placed layer, judged against noise"


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("a", metavar="A", type=run_ref, help="before: run id, UUID or prefix, or a host key or hostname (its newest run)")
    p.add_argument("b", metavar="B", type=run_ref, help="after: same forms as A")
    p.add_argument("--json", action="store_true", help="print the comparison as JSON")
    p.add_argument("--allow-different-hosts", action="store_true",
                   help="compare runs of different hardware (refused by default)")
    p.add_argument("--threshold", metavar="PCT", default=str(DEFAULT_THRESHOLD * 100),
                   help=f"smallest change that counts, in percent (default {DEFAULT_THRESHOLD * 100:g})")
    p.add_argument("--db", metavar="URL", help="store URL (default $EAVES_DB or sqlite:///results/eaves.db)")


def run(args: argparse.Namespace) -> int:
    from eaves.commands._verdicts import parse_percent
    from eaves.diff import diff_noise, diff_runs, resolve_ref
    from eaves.store import Store

    threshold = parse_percent(args.threshold, "--threshold")
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
        sys.stdout.write(json.dumps(_document(result), indent=2, default=str, allow_nan=False) + "\n")
    else:
        _print(result)
    return EXIT_WORSE if result.worse else 0


def _document(d) -> dict:
    from eaves.commands._verdicts import comparison_dict

    def meta(s):
        return {"id": s.id, "uuid": s.uuid, "host_key": s.host_key, "hostname": s.hostname, "kind": s.kind,
                "started_at": s.started_at, "tag": s.tag}

    doc = {"before": meta(d.before), "after": meta(d.after), "threshold_pct": d.threshold * 100,
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
    from rich.console import Console
    from eaves.plain import plain
    from rich.table import Table

    from eaves.commands._verdicts import change_cell, floor_cell, format_value, noise_summary, p_cell, verdict_cell

    console = Console(highlight=False, emoji=False)
    if not console.is_terminal:
        console = Console(width=max(console.width, 160), highlight=False, emoji=False)
    b, a = d.before, d.after
    console.print(f"before: run {b.id} {plain(b.uuid[:8])} {plain(b.host_key)} {b.started_at:%Y-%m-%d %H:%M}"
                  f"{' tag ' + plain(b.tag) if b.tag else ''}")
    console.print(f"after:  run {a.id} {plain(a.uuid[:8])} {plain(a.host_key)} {a.started_at:%Y-%m-%d %H:%M}"
                  f"{' tag ' + plain(a.tag) if a.tag else ''}")
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
            t.add_row(plain(m.key.name()), format_value(c.before, m.unit), format_value(c.after, m.unit),
                      change_cell(c), p_cell(c), floor_cell(c), verdict_cell(c))
        console.print(t)
        line = noise_summary(m.comparison for m in d.metrics)
        if line:
            console.print(line)
    if d.layers:
        _print_layers(console, d.layers)
    worse = d.worse
    console.print(f"[bold red]worse beyond noise: {len(worse)}[/]" if worse else "nothing got worse beyond noise")


def _print_layers(console, layers, title: str = "placed layers: efficiency against the roof") -> None:
    from eaves.plain import plain
    from rich.table import Table

    from eaves.commands._verdicts import change_cell, floor_cell, format_value, noise_summary, p_cell, verdict_cell

    t = Table(title=title, title_justify="left", header_style="bold")
    for col in ("layer", "before", "after", "eff before", "eff after", "change", "p", "floor", "verdict"):
        t.add_column(col, justify="left" if col in ("layer", "verdict") else "right")
    for c in layers.changes:
        name = plain(c.layer) + (" [yellow](counts changed)[/]" if c.counts_changed else "")
        t.add_row(name, format_value(c.before_seconds, "seconds"), format_value(c.after_seconds, "seconds"),
                  format_value(c.before_efficiency, "efficiency"), format_value(c.after_efficiency, "efficiency"),
                  change_cell(c.comparison), p_cell(c.comparison), floor_cell(c.comparison), verdict_cell(c.comparison))
    console.print(t)
    line = noise_summary((c.comparison for c in layers.changes), "layers")
    if line:
        console.print(line)
    for name in layers.new:
        console.print(f"new layer: {plain(name)}")
    for name in layers.vanished:
        console.print(f"vanished layer: {plain(name)}")
