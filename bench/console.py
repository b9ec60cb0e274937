"""The terminal console every command prints to, and the printouts several commands share
(a run's ceilings: survey, show; placed layers: place, profile-torch)."""

from __future__ import annotations

import os
import sys
from typing import Mapping, Optional, Sequence

from rich.console import Console
from rich.text import Text

from eaves.plain import plain, visible
from eaves.records import Figure, PlacedLayer

PIPE_WIDTH = 200  # columns for a file or pipe: tables whole, never folded to a guessed terminal width


def make_console(stderr: bool = False) -> Console:
    """A console that wraps tables to the terminal, but at least 200 columns ($COLUMNS if wider) when output
    goes to a file or pipe, and never breaks a plain line (so logs and tests see whole sentences); no
    highlighting and no :emoji: codes replaced (stored strings pass through eaves.plain.plain, which
    escapes markup but cannot escape those)."""
    stream = sys.stderr if stderr else sys.stdout
    width = None if stream.isatty() else max(PIPE_WIDTH, _columns())
    return Console(stderr=stderr, highlight=False, width=width, soft_wrap=True, emoji=False)


def _columns() -> int:
    try:
        return int(os.environ.get("COLUMNS", "0"))
    except ValueError:  # a COLUMNS that is not a number is the shell's mistake, not a reason to stop
        return 0


def print_ceilings(console: Console, figures: Sequence[Figure], levels: dict, title: str,
                   failures: Sequence[dict] = (), steadiness: Optional[Mapping] = None) -> None:
    """Memory table, stride table and penalty, compute table, failed steps: whichever the run has;
    with `steadiness` (eaves.noise.steadiness) the run-to-run spread of each headline ceiling that has one."""
    from eaves.ceilings import latency_ceilings, memory_ceilings, stride_penalty, stride_rows
    from eaves.tables import compute_table, failures_table, memory_table, steadiness_table, stride_table

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

        spread = headline(steadiness, figures)
        if spread:
            console.print(steadiness_table(spread, f"Run-to-run spread on this host (last "
                                                   f"{max(n.runs for _, n in spread)} complete runs)"))
    if failures:
        console.print(failures_table(failures))


def print_placements(console: Console, run_uuid: str, host_key: str, placed: Sequence[PlacedLayer],
                     rows: int = 0) -> None:
    """The placed layers, most headroom first (the first `rows`; 0: all), and why any is impossible."""
    from eaves.tables import placements_table

    order = sorted(placed, key=lambda p: (p.bound != "impossible", -p.headroom))
    console.print(placements_table(order[:rows or None], f"layers under run {plain(run_uuid[:8])} of "
                                   f"{plain(host_key)} (most headroom first)"))
    if rows and len(order) > rows:
        console.print(f"... and {len(order) - rows} more layer(s) with less headroom (--rows 0 shows all; "
                      "--json has every layer)")
    for p in order:
        if p.bound == "impossible":
            console.print(Text.assemble((visible(p.layer), "red"), ": ", visible(p.extra["reason"])))
