"""`eaves place`: place layer timings (a file, or the built-in reference layers) under a run's roofs."""

from __future__ import annotations

import argparse

from eaves.cli_options import add_db_option, add_json_option, check_json_path, json_to_stdout, run_ref, write_json
from eaves.errors import InputError

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
    add_json_option(parser, "the placements")
    parser.add_argument("--chart", metavar="PATH", help="draw the roofline chart to PATH (.png and .svg)")
    parser.add_argument("--rows", metavar="N", type=int, default=TABLE_ROWS,
                        help=f"layers shown in the table, most headroom first (default {TABLE_ROWS}; 0: all; "
                             "--json always has every layer)")
    parser.add_argument("--store", action="store_true",
                        help="with FILE: also store the placements as a run of the ceilings run's host "
                             "(--builtin always stores)")
    add_db_option(parser)


def run(args: argparse.Namespace) -> int:
    from eaves.document import placements_document
    from eaves.place import Placer, as_dtype, place_layers
    from eaves.roofline import model_from_store
    from eaves.store import Store

    if args.rows < 0:
        raise InputError(f"--rows: {args.rows} is negative (0 shows every layer)")
    if bool(args.file) == bool(args.builtin):
        raise InputError("place: give either a layer FILE or --builtin")
    check_json_path(args.json)
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
        from eaves.layer_runs import store_layers_run
        from eaves.reference_layers import SCENARIO

        stored = store_layers_run(store, facts, model, placed,
                                  {"builtin": True, "quick": args.quick, "threads": args.threads}, SCENARIO)
    elif args.store:
        from eaves.layer_runs import store_file_layers

        stored = store_file_layers(store, model, placed, args.file)
    if args.chart:
        from eaves.roofline_chart import draw_chart

        written = draw_chart(model, placed, args.chart)
    if args.json:
        write_json(placements_document(model.run_uuid, model.host_key, placed, projections, curves, stored),
                   args.json)
    if not json_to_stdout(args.json):
        _print(model, placed, projections, curves, skipped, stored, rows=args.rows)
        if args.chart:
            from eaves.plain import visible

            print("chart: " + ", ".join(visible(p) for p in written))
    return 0


def _time_builtin(model, args):
    from eaves.place import Placer
    from eaves.reference_layers import NUMPY_TYPES, time_reference_layers

    placer = Placer(model)
    dtypes = [d for d in NUMPY_TYPES if placer.roofs(d, args.threads) is not None]
    skipped = [d for d in NUMPY_TYPES if d not in dtypes]
    if not dtypes:
        raise InputError(f"--builtin: dtype: run {model.run_uuid[:8]} has no compute ceilings for "
                         f"{' or '.join(NUMPY_TYPES)}")
    return time_reference_layers(small=args.quick, threads=args.threads, dtypes=dtypes), skipped


def _print(model, placed, projections, curves, skipped, stored, rows: int = 0) -> None:
    from rich.table import Table

    from eaves.console import make_console, print_placements
    from eaves.plain import plain
    from eaves.units import format_bytes, format_duration, format_rate

    console = make_console()
    print_placements(console, model.run_uuid, model.host_key, placed, rows)
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
                      plain(b.bound), format_duration(b.latency_seconds), format_rate(b.items_per_s, ""))
        console.print(t)
    if skipped:
        console.print(f"not timed (no compute ceilings in the run): {', '.join(skipped)}")
    if stored:
        console.print(f"stored as run {plain(stored)} (kind layers, ceilings from {plain(model.run_uuid)})")
