"""Find the cache levels in a bandwidth-versus-working-set curve: plateaus and the breaks between them.

The curve is cut into piecewise-constant segments of log-bandwidth by dynamic programming
(least squares plus a penalty per segment), neighbours closer than `MERGE_RATIO` are merged,
and each break is named after the OS-reported cache level whose capacity is nearest to it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Optional, Sequence

MERGE_RATIO = 1.15  # plateaus closer than 15% in bandwidth are one level
PENALTY = 0.02  # per extra segment, in squared log2 units: about a 10% step over 2 points
# A plateau takes the name of the nearest reported level within 3 octaves (a factor of 8): virtual
# machines and shared last-level caches often report more than one core can hold.
MATCH_OCTAVES = 3.0


@dataclass(frozen=True)
class CacheCapacity:
    """What the OS says: a level and the bytes it holds for `threads` threads."""

    name: str  # "L1", "L2", ...
    bytes: int


@dataclass(frozen=True)
class Plateau:
    """One detected level: the sizes it spans and its bandwidth."""

    name: str  # L1, L2, L3, DRAM, or L? when no reported level is near
    first: int  # index of its first point in the curve
    last: int  # index of its last point
    sizes: tuple[int, ...]
    bytes_per_s: float  # median of the plateau's points
    edge_bytes: Optional[int]  # largest size still on the plateau (the detected capacity)
    reported_bytes: Optional[int]  # the OS-reported capacity it was matched with


def _segments(y: Sequence[float], penalty: float, min_len: int) -> list[tuple[int, int]]:
    n = len(y)
    pre, pre2 = [0.0], [0.0]
    for v in y:
        pre.append(pre[-1] + v)
        pre2.append(pre2[-1] + v * v)

    def cost(i: int, j: int) -> float:  # points i..j-1
        s, s2, m = pre[j] - pre[i], pre2[j] - pre2[i], j - i
        return s2 - s * s / m

    best = [0.0] + [math.inf] * n
    cut = [0] * (n + 1)
    for j in range(1, n + 1):
        for i in range(0, j):
            if j - i < min(min_len, n):
                continue
            c = best[i] + cost(i, j) + penalty
            if c < best[j]:
                best[j], cut[j] = c, i
    out, j = [], n
    while j > 0:
        out.append((cut[j], j - 1))
        j = cut[j]
    return out[::-1]


def _median(values: Sequence[float]) -> float:
    s = sorted(values)
    m = len(s) // 2
    return s[m] if len(s) % 2 else 0.5 * (s[m - 1] + s[m])


def detect_plateaus(sizes: Sequence[int], bytes_per_s: Sequence[float],
                    reported: Sequence[CacheCapacity] = (), dram_after: Optional[int] = None) -> list[Plateau]:
    """Plateaus of a curve sorted by size; the last is DRAM when it reaches `dram_after` bytes."""
    if len(sizes) < 2:
        raise ValueError("a curve needs at least two points")
    y = [math.log2(v) for v in bytes_per_s]
    segs = _segments(y, PENALTY * len(y) / 8 + PENALTY, min_len=2)
    merged: list[tuple[int, int]] = []
    for seg in segs:
        if merged:
            a = _median(bytes_per_s[merged[-1][0]:merged[-1][1] + 1])
            b = _median(bytes_per_s[seg[0]:seg[1] + 1])
            if max(a, b) / min(a, b) < MERGE_RATIO:
                merged[-1] = (merged[-1][0], seg[1])
                continue
        merged.append(seg)
    levels = list(reported)
    plateaus = []
    medians = [_median(bytes_per_s[i:j + 1]) for i, j in merged]
    for k, (i, j) in enumerate(merged):
        level = medians[k]
        is_last = k == len(merged) - 1
        edge = sizes[j] if is_last else _crossing(sizes, bytes_per_s, i, merged[k + 1][1],
                                                  math.sqrt(level * medians[k + 1]))
        name, matched = "L?", None
        if is_last and (dram_after is None or sizes[j] >= dram_after or not levels):
            name = "DRAM"
        elif levels:
            nearest = min(levels, key=lambda c: abs(math.log2(edge / c.bytes)))
            if abs(math.log2(edge / nearest.bytes)) <= MATCH_OCTAVES:
                name, matched = nearest.name, nearest.bytes
                levels = levels[levels.index(nearest) + 1:]
        elif not is_last:
            name = f"L{k + 1}"
        plateaus.append(Plateau(name, i, j, tuple(sizes[i:j + 1]), level,
                                None if name == "DRAM" else edge, matched))
    return plateaus


def _crossing(sizes: Sequence[int], values: Sequence[float], first: int, last: int, target: float) -> int:
    """Size at which the curve first falls below `target` between points first..last (log-interpolated):
    a level's capacity is where its bandwidth is half-way (geometrically) to the next level's."""
    for p in range(first, last):
        hi, lo = values[p], values[p + 1]
        if hi >= target > lo:
            f = math.log(hi / target) / math.log(hi / lo)
            return int(round(2 ** (math.log2(sizes[p]) + f * math.log2(sizes[p + 1] / sizes[p]))))
    return sizes[last]


def level_of(size: int, plateaus: Sequence[Plateau], sizes: Sequence[int]) -> Optional[str]:
    """The level a sweep size was measured in (by the plateau that contains it)."""
    for p in plateaus:
        if sizes[p.first] <= size <= sizes[p.last]:
            return p.name
    return None


def representative(p: Plateau) -> int:
    """Index of the point that stands for a plateau: its middle, away from the transitions; for
    DRAM the second largest (far past every cache, half the cost of the largest to measure)."""
    if p.name == "DRAM":
        return max(p.first, p.last - 1)
    return (p.first + p.last) // 2
