"""`eaves place`: place layer timings (a file, or the built-in reference layers) under a run's roofs."""

from __future__ import annotations

import argparse
import dataclasses
import datetime as dt
import json
import sys
from pathlib import Path

from eaves.errors import InputError
from eaves.plain import plain, visible
from eaves.units import format_bytes, format_rate
from eaves.commands._refs import run_ref

NAME = "place"
TABLE_ROWS = 60  # a terminal table of 100 000 rows took 150 s to render and nobody reads it
HELP = "place layer timings under this host's measured roofs (from a file or the built-in layers)"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("file", nargs="?", help="layer timings, CSV or JSON (see docs/layer-files.md)")
    parser.add_argument("--builtin", action="store_true",
                        help="time the built-in reference layers on this host, place them and store them")
    parser.add_argument("--quick", action="store_true", help="with --builtin: small layers, short samples")
    parser.add_argument("--threads", type=int, default=1, help="with --builtin: threads to run them with (default 1)")
    parser.add_argument("--run", metavar="R", type=run_ref, help="survey run whose roofs to use (id, UUID or prefix; "
                        "default: the newest complete survey of this host)")
    parser.add_argument("--as-dtype", metavar="D", help="also show where each layer would move at dtype D")
    parser.add_argument("--batching", action="store_true",
                        help="for dense and attention layers, show intensity and throughput per batch size")
    parser.add_argument("--json", metavar="PATH", help="write the placements as JSON to PATH ('-': stdout)")
    parser.add_argument("--chart", metavar="PATH", help="draw the roofline chart to PATH (.png and .svg)")
    parser.add_argument("--rows", metavar="N", type=int, default=TABLE_ROWS,
                        help=f"layers shown in the table, most headroom first (default {TABLE_ROWS}; 0: all; "
                             "--json always has every layer)")
    parser.add_argument("--store", action="store_true",
                        help="with FILE: also store the placements as a run of the ceilings run's host "
                             "(--builtin always stores)")
    parser.add_argument("--db", metavar="URL", default=None,
                        help="store URL (default: $EAVES_DB or sqlite:///results/eaves.db)")


def run(args: argparse.Namespace) -> int:
    from eaves.place import Placer, as_dtype, place_layers
    from eaves.roofline import model_from_store
    from eaves.store import Store

    if args.rows < 0:
        raise InputError(f"--rows: {args.rows} is negative (0 shows every layer)")
    if bool(args.file) == bool(args.builtin):
        raise InputError("place: give either a layer FILE or --builtin")
    if args.builtin:
        from eaves.threads import check_thread_counts

        check_thread_counts([args.threads])
    store = Store(args.db)
    if args.builtin:
        from eaves.host import collect_host_facts

        facts = collect_host_facts()
        model = model_from_store(store, args.run, host=facts.host_key())
        specs, skipped = _time_builtin(model, args)
    else:
        from eaves.layerfile import read_layers

        specs = read_layers(args.file)  # file errors first: they need no store
        model = model_from_store(store, args.run)
        skipped = []
    placed = place_layers(specs, model)
    projections = as_dtype(specs, model, args.as_dtype.lower()) if args.as_dtype else []
    placer = Placer(model)
    curves = {s.name: placer.batch_curve(s) for s in specs
              if args.batching and s.kind in ("dense", "matmul", "attention")}
    stored = None
    if args.builtin:
        stored = _store_builtin(store, facts, model, placed, args)
    elif args.store:
        stored = _store_file(store, model, placed, args.file)
    if args.chart:
        from eaves.roofline_chart import draw_chart

        written = draw_chart(model, placed, args.chart)
    to_stdout = args.json == "-"
    if args.json:
        _write_json(args.json, model, placed, projections, curves, stored)
    if not to_stdout:
        _print(model, placed, projections, curves, skipped, stored, rows=args.rows)
        if args.chart:
            print("chart: " + ", ".join(visible(p) for p in written))
    return 0


def _time_builtin(model, args):
    from eaves.place import Placer
    from eaves.reference_layers import DTYPES, time_reference_layers

    placer = Placer(model)
    dtypes = [d for d in DTYPES if placer.roofs(d, args.threads) is not None]
    skipped = [d for d in DTYPES if d not in dtypes]
    if not dtypes:
        raise InputError(f"--builtin: dtype: run {model.run_uuid[:8]} has no compute ceilings for "
                         f"{' or '.join(DTYPES)}")
    return time_reference_layers(small=args.quick, threads=args.threads, dtypes=dtypes), skipped


def _store_builtin(store, facts, model, placed, args) -> str:
    from eaves.reference_layers import SCENARIO

    return store_layers_run(store, facts, model, placed,
                            {"builtin": True, "quick": args.quick, "threads": args.threads}, SCENARIO)


def _store_file(store, model, placed, path: str) -> str:
    """A file's layers, stored under the host whose ceilings they were placed under (the timings
    may come from anywhere: the file says nothing of the machine)."""
    from eaves import __version__
    from eaves.records import RunRecord

    survey = store.load_run(store.resolve_run(model.run_uuid))
    ceilings, host_facts = survey.summary, survey.host_facts
    now = dt.datetime.now(dt.timezone.utc)
    record = RunRecord(host_key=ceilings.host_key, hostname=ceilings.hostname,
                       fingerprint=store.host_fingerprint(ceilings.host_key) or "", host_facts=host_facts,
                       started_at=now, eaves_version=__version__, params={"file": str(path)}, kind="layers",
                       status="complete", ended_at=now, note=f"layer timings from {path}",
                       ceilings_run_uuid=model.run_uuid, placements=list(placed))
    return store.save_run(record)


def store_layers_run(store, facts, model, placed, params: dict, note: str) -> str:
    """Store placements timed on this host as a complete "layers" run linked to its ceilings run."""
    from eaves import __version__
    from eaves.records import RunRecord

    now = dt.datetime.now(dt.timezone.utc)
    record = RunRecord(host_key=facts.host_key(), hostname=facts.hostname, fingerprint=facts.fingerprint(),
                       host_facts=facts.to_dict(), started_at=now, eaves_version=__version__,
                       params=params, kind="layers", status="complete", ended_at=now, note=note,
                       ceilings_run_uuid=model.run_uuid, placements=list(placed))
    return store.save_run(record)


def _write_json(path, model, placed, projections, curves, stored, extra=None) -> None:
    doc = {"ceilings_run": model.run_uuid, "host_key": model.host_key, "stored_run": stored,
           "layers": [dataclasses.asdict(p) for p in placed],
           "as_dtype": [dataclasses.asdict(p) for p in projections],
           "batching": {name: [dataclasses.asdict(b) for b in pts] for name, pts in curves.items()},
           **(extra or {})}
    text = json.dumps(doc, indent=2, allow_nan=False, default=str)
    if path == "-":
        sys.stdout.write(text + "\n")
        return
    try:
        Path(path).write_text(text + "\n", encoding="utf-8")
    except OSError as err:
        raise InputError(f"--json {path}: cannot write: {err.strerror}") from None


def _seconds(s: float) -> str:
    for unit, scale in (("s", 1.0), ("ms", 1e-3), ("µs", 1e-6)):
        if s >= scale:
            return f"{s / scale:.3g} {unit}"
    return f"{s / 1e-9:.3g} ns"


def _print(model, placed, projections, curves, skipped, stored, rows: int = 0) -> None:
    from rich.console import Console
    from rich.table import Table
    from rich.text import Text

    console = Console(emoji=False)
    if not console.is_terminal:
        console = Console(width=max(console.width, 200), emoji=False)  # files and pipes get the whole table
    table = Table(title=f"layers under run {plain(model.run_uuid[:8])} of {plain(model.host_key)} "
                  "(most headroom first)",
                  title_justify="left", header_style="bold")
    table.add_column("layer", no_wrap=True, min_width=min(48, max(len(p.layer) for p in placed)))
    for col in ("kind", "dtype", "thr", "time", "MACs", "FLOP/B", "achieved", "attainable",
                "eff", "mem eff", "bound", "roof", "level", "headroom"):
        table.add_column(col, justify="left" if col in ("kind", "dtype", "bound", "roof", "level") else "right")
    order = sorted(placed, key=lambda p: (p.bound != "impossible", -p.extra["headroom"]))
    for p in order[:rows or None]:
        e = p.extra
        thr = str(p.threads) + ("" if e["threads_match"] == "exact" else f"→{e['threads_measured']}")
        macs = "-" if e["macs"] is None else format_rate(e["macs"], "")
        bound = "[bold red]impossible[/]" if p.bound == "impossible" else plain(p.bound)
        table.add_row(plain(p.layer), plain(p.kind), plain(p.dtype), thr, _seconds(p.seconds), macs,
                      f"{p.flops_per_byte:.3g}",
                      format_rate(p.flops_per_s, "FLOP/s"), format_rate(p.attainable_flops_per_s, "FLOP/s"),
                      f"{p.efficiency:.0%}", f"{e['memory_efficiency']:.0%}", bound, plain(p.roof),
                      plain(e["consistent_level"] or "none"), f"{e['headroom']:.2f}x")
    console.print(table)
    if rows and len(order) > rows:
        console.print(f"... and {len(order) - rows} more layer(s) with less headroom (--rows 0 shows all; "
                      "--json has every layer)", highlight=False)
    for p in order:
        if p.bound == "impossible":
            console.print(Text.assemble((visible(p.layer), "red"), ": ", visible(p.extra["reason"])), highlight=False)
    if projections:
        t = Table(title=f"what if: at {plain(projections[0].as_dtype)}", title_justify="left", header_style="bold")
        for col in ("layer", "dtype", "bytes", "→ bytes", "FLOP/B", "→ FLOP/B", "attainable", "→ attainable",
                    "→ bound", "→ roof"):
            t.add_column(col, justify="left" if col in ("layer", "dtype", "→ bound", "→ roof") else "right")
        for q in projections:
            t.add_row(plain(q.layer), plain(q.dtype), format_bytes(q.bytes), format_bytes(q.as_bytes), f"{q.flops_per_byte:.3g}",
                      f"{q.as_flops_per_byte:.3g}", format_rate(q.attainable_flops_per_s, "FLOP/s"),
                      format_rate(q.as_attainable_flops_per_s, "FLOP/s"), plain(q.as_bound), plain(q.as_roof))
        console.print(t)
    for name, points in curves.items():
        t = Table(title=f"batching: {plain(name)} at its roof", title_justify="left", header_style="bold")
        for col in ("batch", "FLOP/B", "attainable", "bound", "latency", "items/s"):
            t.add_column(col, justify="right")
        for b in points:
            t.add_row(str(b.batch), f"{b.flops_per_byte:.3g}", format_rate(b.attainable_flops_per_s, "FLOP/s"),
                      plain(b.bound), _seconds(b.latency_seconds), format_rate(b.items_per_s, ""))
        console.print(t)
    if skipped:
        console.print(f"not timed (no compute ceilings in the run): {', '.join(skipped)}")
    if stored:
        console.print(f"stored as run {plain(stored)} (kind layers, ceilings from {plain(model.run_uuid)})")
