"""`eaves trend`: each ceiling of a host over time against its rolling baseline; drift flagged."""

from __future__ import annotations

import argparse

from eaves.cli_options import add_db_option, add_json_option, check_json_path, json_to_stdout, write_json
from eaves.compare import DEFAULT_THRESHOLD
from eaves.errors import EXIT_WORSE, InputError
from eaves.trend import DEFAULT_LAST, DEFAULT_WINDOW, MIN_BASELINE_RUNS

HELP = "history of a host's ceilings, each run against the median of the runs before it; drift flagged"
DOCUMENT_SCHEMA, DOCUMENT_VERSION = "eaves.trend", 2  # 2: verdicts gained | lost | held (unversioned before)


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--host", metavar="H", help="host key or hostname (default: this host)")
    p.add_argument("--metric", metavar="M", action="append",
                   help="only ceilings whose name matches (wildcards or a substring; repeatable), e.g. 'memory/read/DRAM*'")
    p.add_argument("--since", metavar="DATE", help="only runs started on or after DATE (ISO, UTC)")
    p.add_argument("--last", metavar="N", type=int, default=DEFAULT_LAST,
                   help=f"without --since: the newest N runs (default {DEFAULT_LAST})")
    p.add_argument("--window", metavar="K", type=int, default=DEFAULT_WINDOW,
                   help=f"baseline: median of the K complete runs before each run (default {DEFAULT_WINDOW})")
    p.add_argument("--threshold", metavar="PCT", default=str(DEFAULT_THRESHOLD * 100),
                   help=f"smallest move that counts as drift, in percent (default {DEFAULT_THRESHOLD * 100:g})")
    p.add_argument("--chart", metavar="DIR", help="draw one chart per ceiling over time into DIR (PNG and SVG)")
    add_json_option(p, "the history")
    add_db_option(p)


def run(args: argparse.Namespace) -> int:
    from eaves.cli_options import host_or_this, parse_date, parse_percent
    from eaves.store import Store
    from eaves.trend import trend

    threshold = parse_percent(args.threshold, "--threshold")
    since = parse_date(args.since, "--since") if args.since else None
    if args.last is not None and args.last < 1:
        raise InputError(f"--last: {args.last} must be at least 1")
    check_json_path(args.json)
    store = Store(args.db, create=False)
    host = host_or_this(store, args.host)
    result = trend(store, host, args.metric, since, args.window, threshold, args.last)
    if args.metric and not result.metrics:
        raise InputError(f"--metric: no ceiling of {host} matches {', '.join(args.metric)}")
    written = []
    if args.chart:
        from eaves.trend_chart import save_trend_charts

        written = save_trend_charts(result, args.chart)
    if args.json:
        write_json(_document(result), args.json)
    if not json_to_stdout(args.json):
        _print(result, written)
    drifted = [m for m in result.metrics if m.latest.drifted and m.latest.comparison.worse
               and m.latest.baseline_runs >= MIN_BASELINE_RUNS]
    return EXIT_WORSE if drifted else 0


def _document(t) -> dict:
    from eaves.verdicts import comparison_dict

    return {"schema": DOCUMENT_SCHEMA, "schema_version": DOCUMENT_VERSION,
            "host": t.host, "window": t.window, "threshold_pct": t.threshold * 100, "noise_runs": t.noise_runs,
            "runs": [vars(r) for r in t.runs],
            "ceilings": [{"name": m.key.name(), **vars(m.key), "unit": m.unit,
                          "points": [{"run_id": p.run.id, "uuid": p.run.uuid, "started_at": p.run.started_at,
                                      "tag": p.run.tag, "median": p.median, "q1": p.q1, "q3": p.q3,
                                      "baseline": p.baseline, "drifted": p.drifted,
                                      **({"comparison": comparison_dict(p.comparison)} if p.comparison else {})}
                                     for p in m.points]} for m in t.metrics]}


def _print(t, written) -> None:
    from rich.table import Table

    from eaves.console import make_console
    from eaves.plain import plain
    from eaves.units import format_figure
    from eaves.verdicts import change_cell, floor_cell, noise_summary, verdict_cell

    console = make_console()
    if not t.runs:
        console.print(f"no complete survey runs of {plain(t.host)} in this period")
        return
    console.print(f"{plain(t.host)}: {len(t.runs)} complete survey runs, {t.runs[0].started_at:%Y-%m-%d} .. "
                  f"{t.runs[-1].started_at:%Y-%m-%d}; baseline: median of the {t.window} runs before each; "
                  f"run-to-run noise from the {t.noise_runs} runs before each")
    table = Table(title="newest run against its baseline", title_justify="left", header_style="bold")
    for col in ("ceiling", "runs", "first", "baseline", "newest", "change", "floor", "verdict", "drifts"):
        table.add_column(col, justify="left" if col in ("ceiling", "verdict") else "right")
    for m in t.metrics:
        last = m.latest
        drifts = sum(p.drifted for p in m.points)
        c = last.comparison
        table.add_row(plain(m.key.name()), str(len(m.points)), format_figure(m.points[0].median, m.unit),
                      format_figure(last.baseline, m.unit), format_figure(last.median, m.unit),
                      change_cell(c) if c else "-", floor_cell(c) if c else "-",
                      verdict_cell(c) if c else "no baseline", str(drifts))
    console.print(table)
    line = noise_summary(m.latest.comparison for m in t.metrics)
    if line:
        console.print(f"newest run: {line}")
    for m in t.metrics:
        for p in m.points:
            if p.drifted:
                console.print(f"drift: {plain(m.key.name())} run {p.run.id} {plain(p.run.uuid[:8])} "
                              f"{p.run.started_at:%Y-%m-%d %H:%M}: {format_figure(p.baseline, m.unit)} -> "
                              f"{format_figure(p.median, m.unit)} ({p.comparison.change_pct:+.1f}%, "
                              f"{p.comparison.verdict})")
    if written:
        console.print(f"charts: {len(written)} files in {written[0].parent}")
