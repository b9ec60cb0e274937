"""Printing shared by the commands that show a run's ceilings (survey, show)."""

from __future__ import annotations

from typing import Mapping, Optional, Sequence

from rich.console import Console

from eaves.ceilings import latency_ceilings, memory_ceilings, stride_penalty, stride_rows
from eaves.plain import plain
from eaves.records import Figure
from eaves.tables import compute_table, memory_table, stride_table


def print_ceilings(console: Console, figures: Sequence[Figure], levels: dict, title: str,
                   failures: Sequence[dict] = (), steadiness: Optional[Mapping] = None) -> None:
    """Memory table, stride table and penalty, compute table, failed steps: whichever the run has;
    with `steadiness` (eaves.noise.steadiness) the run-to-run spread of each headline ceiling that has one."""
    title = plain(title)
    if any(f.suite == "memory" for f in figures):
        console.print(memory_table(memory_ceilings(figures), latency_ceilings(figures), levels,
                                   f"Memory ceilings, {title}"))
    if any(f.suite == "stride" for f in figures):
        console.print(stride_table(stride_rows(figures), "Strided reads at DRAM size"))
        for t in sorted({f.threads for f in figures if f.suite == "stride"}):
            penalty = stride_penalty(figures, t)
            if penalty:
                console.print(f"stride penalty x{t}: one element per cache line keeps "
                              f"{1 / penalty:.2f}x the useful bandwidth of sequential reads")
    if any(f.suite in ("compute", "gemm") for f in figures):
        from eaves.compute import compute_ceilings

        rows = compute_ceilings(figures)
        console.print(compute_table(rows, f"Compute ceilings, {title}"))
        if any(r.dtype in ("fp16", "bf16") for r in rows) and not any(
                r.native for r in rows if r.dtype in ("fp16", "bf16")):
            console.print("no native fp16/bf16 arithmetic path on this host: those rows (†) are emulated "
                          "and say how")
    if steadiness:
        from eaves.noise import headline
        from eaves.tables import steadiness_table

        rows = headline(steadiness, figures)
        if rows:
            console.print(steadiness_table(rows, f"Run-to-run spread on this host (last {max(n.runs for _, n in rows)} "
                                                 "complete runs)"))
    if failures:
        from eaves.tables import failures_table

        console.print(failures_table(failures))


def make_console(stderr: bool = False) -> Console:
    """A console that wraps tables to the terminal, but 120 columns when output goes to a file or pipe,
    and never breaks a plain line (so logs and tests see whole sentences); no :emoji: codes replaced
    (stored strings pass through eaves.plain.plain, which escapes markup but cannot escape those)."""
    import os
    import sys

    stream = sys.stderr if stderr else sys.stdout
    width = None if stream.isatty() else int(os.environ.get("COLUMNS", 120))
    return Console(stderr=stderr, highlight=False, width=width, soft_wrap=True, emoji=False)
