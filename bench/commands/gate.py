"""`eaves gate`: fail when a code change moved any layer away from its roof by more than allowed."""

from __future__ import annotations

import argparse

from eaves.cli_options import add_db_option, add_json_option, check_json_path, json_to_stdout, write_json
from eaves.errors import EXIT_WORSE
from eaves.gate import DEFAULT_MAX_LOSS

HELP = "fail (exit 1) when any layer lost more than --max-loss of its efficiency, beyond noise"
DOCUMENT_SCHEMA, DOCUMENT_VERSION = "eaves.gate", 2  # 2: verdicts gained | lost | held (unversioned before)


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--baseline", required=True, metavar="RUN_OR_FILE",
                   help="placed layers before: a stored run (id, UUID or prefix) or a layer file (CSV or JSON)")
    p.add_argument("--candidate", required=True, metavar="RUN_OR_FILE", help="placed layers after: same forms")
    p.add_argument("--max-loss", metavar="PCT", default=str(DEFAULT_MAX_LOSS * 100),
                   help=f"largest allowed loss of efficiency, in percent (default {DEFAULT_MAX_LOSS * 100:g})")
    p.add_argument("--run", metavar="R", help="survey run whose roofs layer files are placed under "
                   "(default: the newest complete survey of this host)")
    add_json_option(p, "the verdicts")
    add_db_option(p)


def run(args: argparse.Namespace) -> int:
    from eaves.cli_options import parse_percent
    from eaves.gate import compare_layers, gate_noise, load_layer_set
    from eaves.roofline import model_from_store
    from eaves.store import Store

    max_loss = parse_percent(args.max_loss, "--max-loss")
    check_json_path(args.json)
    store = Store(args.db)
    cache = {}

    def model():
        if "m" not in cache:
            cache["m"] = model_from_store(store, args.run)
        return cache["m"]

    before = load_layer_set(store, args.baseline, model, "baseline")
    after = load_layer_set(store, args.candidate, model, "candidate")
    result = compare_layers(before.layers, after.layers, max_loss, noise=gate_noise(store, before, after))
    if args.json:
        write_json(_document(before, after, max_loss, result), args.json)
    if not json_to_stdout(args.json):
        _print(before, after, result)
    return EXIT_WORSE if result.worse else 0


def _document(before, after, max_loss: float, result) -> dict:
    from eaves.verdicts import comparison_dict

    return {"schema": DOCUMENT_SCHEMA, "schema_version": DOCUMENT_VERSION,
            "baseline": before.source, "candidate": after.source, "max_loss_pct": max_loss * 100,
            "layers": [{"layer": c.layer, "kind": c.kind, "dtype": c.dtype, "threads": c.threads,
                        "counts_changed": c.counts_changed, "efficiency": comparison_dict(c.comparison)}
                       for c in result.changes],
            "new_layers": list(result.new), "vanished_layers": list(result.vanished),
            "failed": [c.layer for c in result.worse]}


def _print(before, after, result) -> None:
    from eaves.console import make_console
    from eaves.plain import plain
    from eaves.verdicts import print_layer_changes

    console = make_console()
    console.print(f"baseline: {plain(before.source)}   candidate: {plain(after.source)}")
    print_layer_changes(console, result, f"layers in both: efficiency against the roof "
                                         f"(fail beyond {result.threshold:.0%} loss, the run-to-run floor "
                                         "and the samples' noise)")
    if not result.changes:
        console.print("[yellow]no layer is in both sets: nothing to gate[/]")
    for c in result.worse:
        console.print(f"[bold red]FAIL[/] {plain(c.layer)}: efficiency {c.before_efficiency:.1%} -> "
                      f"{c.after_efficiency:.1%} ({c.comparison.change_pct:+.1f}%)")
    if not result.worse:
        console.print("[green]pass[/]: no layer moved away from its roof beyond the allowed loss")
