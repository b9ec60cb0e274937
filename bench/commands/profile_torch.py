"""`eaves profile-torch`: time every layer of a PyTorch model on this host and place it under the roofs."""

from __future__ import annotations

import argparse

from eaves.cli_options import add_db_option, add_json_option, check_json_path, json_to_stdout, run_ref, write_json
from eaves.errors import InputError

HELP = "time each layer of a PyTorch model (MODULE:FACTORY) on this host and place it under its roofs"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("model", metavar="MODULE:FACTORY",
                        help="a function returning a torch.nn.Module, e.g. eaves.torch_demo:tiny_tagger")
    parser.add_argument("--input-shape", required=True, metavar="N,C,...",
                        help="shape of the random example input, e.g. 1,3,224,224 (token ids if the first "
                        "layer is an Embedding)")
    parser.add_argument("--dtype", default="fp32", choices=("fp32", "bf16", "int8"),
                        help="fp32; bf16 (hosts with native bf16 only); int8: Linear layers dynamically quantized")
    parser.add_argument("--threads", type=int, default=1, help="torch threads to run with (default 1)")
    parser.add_argument("--quick", action="store_true", help="short samples (for tests and first looks)")
    parser.add_argument("--run", metavar="R", type=run_ref, help="survey run whose roofs to use (id, UUID or prefix; "
                        "default: the newest complete survey of this host)")
    add_json_option(parser, "the placements, the layers not counted and the whole-pass times")
    parser.add_argument("--chart", metavar="PATH", help="draw the roofline chart to PATH (.png and .svg)")
    parser.add_argument("--layers-out", metavar="FILE",
                        help="write the timed layers as a JSON layer file, to replay with `eaves place FILE`")
    parser.add_argument("--no-store", action="store_true", help="do not store the placements as a run")
    add_db_option(parser)


def run(args: argparse.Namespace) -> int:
    from eaves.host import collect_host_facts
    from eaves.layer_runs import store_layers_run
    from eaves.place import Placer, place_layers
    from eaves.roofline import model_from_store
    from eaves.store import Store
    from eaves.threads import check_thread_counts
    from eaves.timing import TimingPolicy

    check_thread_counts([args.threads])
    check_json_path(args.json)
    facts = collect_host_facts()
    store = Store(args.db)
    model = model_from_store(store, args.run, host=facts.host_key())  # no roofs: fail before any timing
    from eaves import torch_profile  # raises InputError without PyTorch

    shape = torch_profile.parse_shape(args.input_shape)
    torch_profile.check_dtype(args.dtype, facts.features)
    for d in {"fp32", args.dtype} if args.dtype == "int8" else {args.dtype}:  # int8 keeps other layers in fp32
        if Placer(model).roofs(d, args.threads) is None:
            raise InputError(f"--dtype {args.dtype}: run {model.run_uuid[:8]} has no compute ceilings for {d} "
                             f"(measured: {', '.join(model.dtypes()) or 'none'})")
    profile = torch_profile.profile_factory(args.model, shape, dtype=args.dtype, threads=args.threads,
                                            policy=TimingPolicy.tiny() if args.quick else None)
    if not profile.layers and not profile.not_counted:
        raise InputError(f"MODEL: {args.model} ran no layers")
    placed = place_layers(profile.layers, model)
    stored = None
    if not args.no_store and placed:
        params = {"torch": True, "model": args.model, "input_shape": list(shape), "dtype": args.dtype,
                  "threads": args.threads, "quick": args.quick,
                  "not_counted": [n.name for n in profile.not_counted]}
        stored = store_layers_run(store, facts, model, placed, params, f"PyTorch model {args.model}")
    written_layers = torch_profile.write_layer_file(profile, args.layers_out) if args.layers_out else None
    if args.chart and placed:
        from eaves.roofline_chart import draw_chart

        charts = draw_chart(model, placed, args.chart)
    if args.json:
        from eaves.document import placements_document

        write_json(placements_document(
            model.run_uuid, model.host_key, placed, stored_run=stored,
            model=args.model, input_shape=list(shape), dtype=args.dtype,
            pass_seconds=list(profile.pass_seconds), layer_share=profile.layer_share,
            not_counted=[{"layer": n.name, "module_type": n.module_type, "seconds": n.median_seconds,
                          "samples": list(n.seconds), "reason": n.reason} for n in profile.not_counted]), args.json)
    if json_to_stdout(args.json):
        return 0
    _print(profile, stored, model, placed, written_layers, charts if args.chart and placed else None)
    return 0


def _print(profile, stored, model, placed, layers_file, charts) -> None:
    from rich.table import Table

    from eaves.console import make_console, print_placements
    from eaves.plain import plain
    from eaves.units import format_duration

    console = make_console()
    if placed:
        print_placements(console, model.run_uuid, model.host_key, placed)
    if profile.not_counted:
        t = Table(title="not counted (timed, but eaves has no operation count for them)", title_justify="left",
                  header_style="bold")
        for col in ("layer", "module", "time", "why"):
            t.add_column(col, justify="right" if col == "time" else "left")
        for n in profile.not_counted:
            t.add_row(plain(n.name), plain(n.module_type), format_duration(n.median_seconds), plain(n.reason))
        console.print(t)
    passes = sorted(profile.pass_seconds)
    console.print(f"{plain(profile.model)} at {plain(profile.dtype)}, {profile.threads} thread(s), input "
                  f"{'x'.join(map(str, profile.input_shape))}: one pass {format_duration(passes[len(passes) // 2])}, "
                  f"{profile.layer_share:.0%} of it inside layers (the rest: code between layers, hooks)",
                  highlight=False)
    roof = model.compute_roof(profile.dtype, profile.threads)
    if roof is not None and roof.detail == "emulated":
        dtype = plain(profile.dtype)
        console.print(f"note: run {plain(model.run_uuid[:8])} measured {dtype} without a native path "
                      f"({plain(roof.name)} is emulated); PyTorch may use the host's native {dtype} units and "
                      "land above that roof", highlight=False)
    if layers_file:
        console.print(f"layer file: {plain(layers_file)} (replay: eaves place {plain(layers_file)})", highlight=False)
    if charts:
        console.print("chart: " + ", ".join(plain(p) for p in charts), highlight=False)
    if stored:
        console.print(f"stored as run {plain(stored)} (kind layers, ceilings from {plain(model.run_uuid)})",
                      highlight=False)
