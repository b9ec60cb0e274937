"""Tables for the terminal (rich renderables); built from ceiling rows and placements, printed only by
commands. Every string a store supplied goes in through eaves.plain.plain (shown as written, never as markup)."""

from __future__ import annotations

from typing import Optional, Sequence

from rich.table import Table

from eaves.ceilings import KERNELS, LatencyCeiling, MemoryCeiling, StrideRow, level_key
from eaves.plain import plain
from eaves.records import PlacedLayer, RunSummary
from eaves.units import format_bytes, format_duration, format_rate

VARIANT_MARKS = {"streaming store": "ˢ", "libc memcpy": "ᵐ", "compiled loop": "ᶜ"}


def memory_table(ceilings: Sequence[MemoryCeiling], latency: Sequence[LatencyCeiling],
                 plateaus: dict, title: str) -> Table:
    """One row per level and thread count: bandwidth per kernel, the level's size and its latency."""
    table = Table(title=title, title_justify="left", header_style="bold", box=None, pad_edge=False,
                  caption="ˢ streaming stores  ᵐ C library memcpy  ᶜ compiler-vectorised loop  (else explicit full-width "
                  "vectors)   size: detected / OS-reported",
                  caption_justify="left")
    table.add_column("level", no_wrap=True)
    table.add_column("size", justify="right", no_wrap=True)
    table.add_column("thr", justify="right")
    for k in KERNELS:
        table.add_column(k, justify="right", no_wrap=True)
    table.add_column("latency", justify="right", no_wrap=True)
    lat = {c.level: c.ns_per_load for c in latency}
    levels = sorted({c.level for c in ceilings}, key=level_key)
    threads = sorted({c.threads for c in ceilings})
    by = {(c.level, c.kernel, c.threads): c for c in ceilings}
    for level in levels:
        for i, t in enumerate(threads):
            cells = []
            for k in KERNELS:
                c = by.get((level, k, t))
                cells.append("-" if c is None else format_rate(c.bytes_per_s, "B/s") + VARIANT_MARKS.get(c.variant, ""))
            size = _size_cell(level, plateaus.get(str(t)) or plateaus.get(t) or [])
            latency = format_duration(lat[level] * 1e-9) if (i == 0 and level in lat) else ""
            shown = level + (" (possibly cache-assisted)" if any(c.caution for c in ceilings if c.level == level) else "")
            table.add_row(plain(shown) if i == 0 else "", size, str(t), *cells, latency,
                          end_section=i == len(threads) - 1)
    return table


def _size_cell(level: str, plateaus: list) -> str:
    for p in plateaus:
        if p["name"] == level:
            detected = format_bytes(p["edge_bytes"]) if p.get("edge_bytes") else f">{format_bytes(p['first_bytes'])}"
            reported = format_bytes(p["reported_bytes"]) if p.get("reported_bytes") else "-"
            return f"{detected} / {reported}"
    return "-"


def stride_table(rows: Sequence[StrideRow], title: str) -> Table:
    table = Table(title=title, title_justify="left", header_style="bold", box=None, pad_edge=False)
    for name in ("stride", "thr", "useful", "cache lines moved", "useful vs stride 8 B"):
        table.add_column(name, justify="right")
    for r in rows:
        table.add_row(format_bytes(r.stride_bytes), str(r.threads), format_rate(r.useful_bytes_per_s, "B/s"),
                      format_rate(r.line_bytes_per_s, "B/s"), f"{r.vs_sequential:.2f}x")
    return table


def compute_table(rows: Sequence, title: str) -> Table:
    """Per dtype and thread count: peak, achievable GEMM, theoretical bound and the share of it."""
    paths = {}
    for c in rows:
        if c.peak_variant:
            paths.setdefault(c.dtype, c.peak_variant)
    caption = ["OP/s for integer rows (MAC/s beside, 1 MAC = 2 OP), FLOP/s otherwise; † not native here"]
    caption += [f"{plain(d)}: {plain(p)}" for d, p in paths.items()]
    table = Table(title=title, title_justify="left", header_style="bold", box=None, pad_edge=False,
                  caption="\n".join(caption), caption_justify="left")
    for name in ("dtype", "thr", "peak", "MAC/s", "GEMM", "GEMM shape", "theoretical", "of theor."):
        table.add_column(name, justify="left" if name in ("dtype", "GEMM shape") else "right", no_wrap=True)
    for c in rows:
        unit = "OP/s" if c.dtype.startswith("int") else "FLOP/s"
        table.add_row(plain(c.dtype) + ("" if c.native else " †"), str(c.threads),
                      format_rate(c.peak_ops_per_s, unit),
                      format_rate(c.peak_macs_per_s, "MAC/s") if c.dtype.startswith("int") else "",
                      format_rate(c.gemm_ops_per_s, unit), plain(c.gemm_shape or "-"),
                      format_rate(c.theoretical_ops_per_s, unit),
                      "-" if c.pct_of_theoretical is None else f"{c.pct_of_theoretical:.0f}%")
    return table


def runs_table(runs: Sequence[RunSummary], title: Optional[str] = None) -> Table:
    table = Table(title=title, title_justify="left", header_style="bold", box=None, pad_edge=False)
    for name in ("id", "uuid", "host", "kind", "status", "started (UTC)", "secs", "tag", "figures", "layers", "git"):
        table.add_column(name)
    for r in runs:
        secs = f"{(r.ended_at - r.started_at).total_seconds():.0f}" if r.ended_at else "-"
        table.add_row(str(r.id), plain(r.uuid[:8]), plain(r.host_key), plain(r.kind), plain(r.status),
                      r.started_at.strftime("%Y-%m-%d %H:%M:%S"), secs, plain(r.tag or ""), str(r.n_figures),
                      str(r.n_placements), plain(r.git_describe or ""))
    return table


def placements_table(placed: Sequence[PlacedLayer], title: str) -> Table:
    """One row per placed layer, in the order given: time, counts, rates, efficiencies, roof and headroom."""
    table = Table(title=title, title_justify="left", header_style="bold")
    table.add_column("layer", no_wrap=True, min_width=min(48, max((len(p.layer) for p in placed), default=5)))
    for col in ("kind", "dtype", "thr", "time", "MACs", "FLOP/B", "achieved", "attainable",
                "eff", "mem eff", "bound", "roof", "level", "headroom"):
        table.add_column(col, justify="left" if col in ("kind", "dtype", "bound", "roof", "level") else "right")
    for p in placed:
        thr = str(p.threads) + ("" if p.threads_match == "exact" else f"→{p.threads_measured}")
        bound = "[bold red]impossible[/]" if p.bound == "impossible" else plain(p.bound)
        table.add_row(plain(p.layer), plain(p.kind), plain(p.dtype), thr, format_duration(p.seconds),
                      "-" if p.macs is None else format_rate(p.macs, ""), f"{p.flops_per_byte:.3g}",
                      format_rate(p.flops_per_s, "FLOP/s"), format_rate(p.attainable_flops_per_s, "FLOP/s"),
                      f"{p.efficiency:.0%}", f"{p.memory_efficiency:.0%}", bound, plain(p.roof),
                      plain(p.consistent_level or "none"), f"{p.headroom:.2f}x")
    return table


def failures_table(failures: Sequence[dict], title: str = "Steps that gave no figure") -> Table:
    """One row per failed step: what ran (the progress label) and why it gave nothing."""
    table = Table(title=title, title_justify="left", header_style="bold red", box=None, pad_edge=False)
    table.add_column("step")
    table.add_column("reason")
    for f in failures:
        table.add_row(plain(f.get("label", "?")), plain(f.get("reason", "?")))
    return table


def steadiness_table(rows: Sequence, title: str) -> Table:
    """(MetricKey, RunNoise) rows: how far each headline ceiling moved from run to run on this host."""
    from eaves.noise import NOISE_MULTIPLE

    table = Table(title=title, title_justify="left", header_style="bold", box=None, pad_edge=False,
                  caption=f"spread: median change between consecutive runs; a change between two runs counts "
                  f"beyond {NOISE_MULTIPLE:g}x it (and beyond the threshold and the samples' noise)",
                  caption_justify="left")
    for name in ("ceiling", "runs", "spread", "counts beyond"):
        table.add_column(name, justify="left" if name == "ceiling" else "right", no_wrap=True)
    for key, n in rows:
        table.add_row(plain(key.name()), str(n.runs), f"{n.spread:.1%}", f"{n.floor:.0%}")
    return table
