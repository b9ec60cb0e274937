"""The ceilings of a run as rows: per level and thread count, per stride, per dtype (for tables, JSON, charts)."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Optional, Sequence

from eaves.records import Figure
from eaves.timing import coefficient_of_variation

LEVEL_ORDER = ("L1", "L2", "L3", "L4", "L?", "DRAM")
KERNELS = ("read", "write", "copy", "axpy")


def level_key(name: Optional[str]) -> int:
    return LEVEL_ORDER.index(name) if name in LEVEL_ORDER else len(LEVEL_ORDER)


@dataclass(frozen=True)
class MemoryCeiling:
    """Best bandwidth of one kernel at one level and thread count, and how it was reached."""

    level: str
    kernel: str
    threads: int
    bytes_per_s: float  # median of the best variant
    variant: str
    working_set_bytes: int
    cv: float
    caution: Optional[str] = None  # "possibly cache-assisted" for DRAM taken below the DRAM working set


@dataclass(frozen=True)
class LatencyCeiling:
    level: str
    ns_per_load: float
    working_set_bytes: int


@dataclass(frozen=True)
class StrideRow:
    stride_bytes: int
    threads: int
    useful_bytes_per_s: float
    line_bytes_per_s: float
    vs_sequential: float  # useful bandwidth over the stride-1 figure


def memory_ceilings(figures: Sequence[Figure]) -> list[MemoryCeiling]:
    """For each (level, kernel, threads) the variant with the highest median."""
    best: dict[tuple[str, str, int], Figure] = {}
    for f in figures:
        if f.suite != "memory" or not f.cache_level:
            continue
        key = (f.cache_level, f.kernel, f.threads)
        if key not in best or f.median > best[key].median:
            best[key] = f
    rows = [MemoryCeiling(k[0], k[1], k[2], f.median, f.variant or "", f.working_set_bytes or 0,
                           coefficient_of_variation(f.samples), f.extra.get("caution"))
            for k, f in best.items()]
    return sorted(rows, key=lambda r: (level_key(r.level), r.threads, KERNELS.index(r.kernel)
                                       if r.kernel in KERNELS else 9))


def latency_ceilings(figures: Sequence[Figure]) -> list[LatencyCeiling]:
    rows = [LatencyCeiling(f.cache_level or "?", f.median, f.working_set_bytes or 0)
            for f in figures if f.suite == "latency"]
    return sorted(rows, key=lambda r: r.working_set_bytes)


def stride_rows(figures: Sequence[Figure]) -> list[StrideRow]:
    import statistics

    strides = [f for f in figures if f.suite == "stride"]
    sequential = {f.threads: f.median for f in strides if f.stride_elems == 1}
    rows = []
    for f in sorted(strides, key=lambda f: (f.threads, f.stride_elems or 0)):
        lines = statistics.median(f.extra.get("line_bytes_per_s") or [0.0])
        base = sequential.get(f.threads)
        rows.append(StrideRow(8 * (f.stride_elems or 1), f.threads, f.median, lines,
                              f.median / base if base else float("nan")))
    return rows


def stride_penalty(figures: Sequence[Figure], threads: int) -> Optional[float]:
    """Sequential useful bandwidth over the useful bandwidth at one element per cache line."""
    rows = {r.stride_bytes: r for r in stride_rows(figures) if r.threads == threads}
    if 8 not in rows or 64 not in rows or not rows[64].useful_bytes_per_s:
        return None
    return rows[8].useful_bytes_per_s / rows[64].useful_bytes_per_s
