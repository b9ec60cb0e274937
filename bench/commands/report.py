"""`eaves report`: write one self-contained HTML page about a host."""

from __future__ import annotations

import argparse
from pathlib import Path

from eaves.cli_options import add_db_option
from eaves.errors import InputError

HELP = "write a self-contained HTML report of a host: facts, ceilings, sweep, roofline, trends, runs"


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--host", metavar="H", help="host key or hostname (default: this host)")
    p.add_argument("--out", metavar="DIR", default="results", help="folder for the page (default results)")
    p.add_argument("--window", metavar="K", type=int, default=5, help="trend baseline: runs before each (default 5)")
    add_db_option(p)


def run(args: argparse.Namespace) -> int:
    from eaves.cli_options import host_or_this
    from eaves.report import build_report
    from eaves.store import Store
    from eaves.trend_chart import file_stem

    store = Store(args.db, create=False)
    host = host_or_this(store, args.host)
    report = build_report(store, host, args.window)
    out = Path(args.out)
    path = out / f"report-{file_stem(report.survey.hostname)}.html"
    try:
        out.mkdir(parents=True, exist_ok=True)
        path.write_text(report.html, encoding="utf-8")
    except OSError as err:
        raise InputError(f"--out {args.out}: cannot write {path.name}: {err.strerror}") from None
    from eaves.plain import visible

    print(f"report: {visible(path)} ({report.charts} charts, ceilings from run {visible(report.survey.uuid[:8])})")
    return 0
