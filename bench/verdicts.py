"""Verdicts as people and programs read them (diff, trend, gate, survey --check): table cells, the
JSON of a comparison, the noise line, the layers table, and the survey's baseline check."""

from __future__ import annotations

import dataclasses
import math
from typing import Any, Iterable, Optional

from rich.console import Console
from rich.table import Table

from eaves.compare import DEFAULT_THRESHOLD, GAINED, LOST, Comparison
from eaves.gate import LayerComparison
from eaves.noise import RunNoise
from eaves.plain import plain
from eaves.units import format_figure

VERDICT_STYLE = {GAINED: "green", LOST: "bold red"}


def verdict_cell(c: Comparison) -> str:
    """The verdict word, coloured when it counts."""
    style = VERDICT_STYLE.get(c.verdict)
    return f"[{style}]{c.verdict}[/]" if style else c.verdict


def change_cell(c: Comparison) -> str:
    """The relative change of the medians, signed, in percent."""
    return f"{c.change_pct:+.1f}%" if math.isfinite(c.change_pct) else "-"


def p_cell(c: Comparison) -> str:
    """The rank test's p-value ('-' when too few samples to test)."""
    return "-" if c.p_value is None else f"{c.p_value:.3f}"


def floor_cell(c: Comparison) -> str:
    """The run-to-run floor a change had to pass, and where it came from."""
    n = c.noise
    if n is None or n.source == "none":
        return "-"
    return f"{n.floor:.0%} " + (f"({n.runs} runs)" if n.source == "history" else "default")


def noise_dict(n: Optional[RunNoise]) -> Optional[dict[str, Any]]:
    """Which run-to-run noise a verdict used: source (history, default, none), spread, floor, runs."""
    if n is None:
        return None
    return {"source": n.source, "spread_pct": 100.0 * n.spread, "floor_pct": 100.0 * n.floor, "runs": n.runs}


def noise_summary(comparisons: Iterable[Optional[Comparison]], what: str = "figures") -> str:
    """One line: how many verdicts used a learned spread, a default, or no run-to-run floor."""
    counts = {"history": 0, "default": 0, "none": 0}
    for c in comparisons:
        if c is not None and c.noise is not None:
            counts[c.noise.source] += 1
    parts = [f"learned from this host's runs for {counts['history']} {what}" if counts["history"] else "",
             f"provisional defaults for {counts['default']} (fewer than 3 runs)" if counts["default"] else "",
             f"no floor for {counts['none']} (fewer than 3 runs, no default)" if counts["none"] else ""]
    return "run-to-run noise: " + "; ".join(p for p in parts if p) if any(parts) else ""


def comparison_dict(c: Comparison) -> dict[str, Any]:
    """A comparison as the JSON documents carry it (no infinities; the noise it was held to)."""
    d = dataclasses.asdict(c)
    d["change_pct"] = c.change_pct if math.isfinite(c.change_pct) else None
    d["noise"] = noise_dict(c.noise)
    return d


def print_layer_changes(console: Console, layers: LayerComparison,
                        title: str = "placed layers: efficiency against the roof") -> None:
    """Layers in both sets (eaves.gate.LayerComparison): times, efficiencies and the verdict on each;
    then the new and the vanished ones."""
    t = Table(title=title, title_justify="left", header_style="bold")
    for col in ("layer", "before", "after", "eff before", "eff after", "change", "p", "floor", "verdict"):
        t.add_column(col, justify="left" if col in ("layer", "verdict") else "right")
    for c in layers.changes:
        name = plain(c.layer) + (" [yellow](counts changed)[/]" if c.counts_changed else "")
        t.add_row(name, format_figure(c.before_seconds, "seconds"), format_figure(c.after_seconds, "seconds"),
                  format_figure(c.before_efficiency, "efficiency"), format_figure(c.after_efficiency, "efficiency"),
                  change_cell(c.comparison), p_cell(c.comparison), floor_cell(c.comparison), verdict_cell(c.comparison))
    console.print(t)
    line = noise_summary((c.comparison for c in layers.changes), "layers")
    if line:
        console.print(line)
    for name in layers.new:
        console.print(f"new layer: {plain(name)}")
    for name in layers.vanished:
        console.print(f"vanished layer: {plain(name)}")


def check_after_survey(console: Console, db: Optional[str], uuid: str, window: Optional[int] = None,
                       threshold: float = DEFAULT_THRESHOLD, spooled: bool = False) -> int:
    """`eaves survey --check`: the saved run against its host's baseline, printed; EXIT_WORSE when a
    ceiling was lost and the baseline has enough runs to fail on it (eaves.trend.MIN_BASELINE_RUNS)."""
    from eaves.errors import EXIT_WORSE
    from eaves.trend import DEFAULT_WINDOW, MIN_BASELINE_RUNS

    if spooled:  # the store was unreachable: the baseline is there too
        console.print("[yellow]check: skipped, the run was spooled, not stored; "
                      "`eaves push` it, then `eaves trend` shows how it compares[/]")
        return 0

    from eaves.store import Store
    from eaves.trend import check_run

    check = check_run(Store(db), uuid, DEFAULT_WINDOW if window is None else window, threshold)
    if not check.baseline_runs:
        console.print("check: no earlier complete survey of this host: this run starts its baseline")
        return 0
    console.print(f"check: against the median of {len(check.baseline_runs)} earlier run(s), "
                  f"threshold {threshold:.0%}")
    line = noise_summary(c for _, _, c in check.changes)
    if line:
        console.print(f"check: {line}")
    for key, unit, c in check.moved:
        floor = floor_cell(c)
        console.print(f"{verdict_cell(c)}: {plain(key.name())} {format_figure(c.before, unit)} -> "
                      f"{format_figure(c.after, unit)} ({c.change_pct:+.1f}%"
                      + (f"; run-to-run floor {plain(floor)}" if floor != "-" else "") + ")")
    lost = check.regressions
    if lost and len(check.baseline_runs) < MIN_BASELINE_RUNS:
        console.print(f"[yellow]check: the baseline has {len(check.baseline_runs)} run(s); failing on a "
                      f"lost ceiling needs {MIN_BASELINE_RUNS}, so this is reported, not failed[/]")
        return 0
    if lost:
        console.print(f"[bold red]check: {len(lost)} ceiling(s) {LOST}[/]")
        return EXIT_WORSE
    console.print(f"check: no ceiling {LOST}")
    return 0
