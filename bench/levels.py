"""Find the cache levels in a bandwidth-versus-working-set curve: plateaus and the breaks between them.

The log-bandwidth curve is fitted by least squares with one break per OS-reported level, in level
order, each at most `MATCH_OCTAVES` below and `OVER_OCTAVES` above where that level can end (its own
capacity on an inclusive hierarchy, its capacity plus every level inside it on an exclusive, victim,
one), plus transitions (extra breaks, `PENALTY` each). A level whose bandwidth steps down by less
than `SEEN_RATIO` past it is dropped and the curve refitted: it is "not seen in the bandwidth curve".
Names come only from the OS, or are DRAM; every other plateau is a transition.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Mapping, Optional, Sequence

from eaves.units import format_bytes, format_rate

TRANSITION = "L?"  # a plateau no OS-reported level is matched with
MIN_POINTS = 2  # a plateau spans at least two sweep sizes
# A transition (a segment no level ends) costs 0.02 x (1 + points / 8) squared log2 units: about a
# 10% step over 2 points, more on a longer, noisier curve.
PENALTY = 0.02
# A break where an OS level can end costs half, plus 0.001 per squared octave it lies away from that
# level's capacity (or its sum with the levels inside it), always less than a transition: of two steps
# the level is the one nearer the OS size.
LEVEL_PENALTY = 0.01
DISTANCE_PENALTY = 0.001
# A level's break lies at most 3 octaves (a factor of 8) below where it can end (virtual machines and
# shared last-level caches often report more than one core can hold) and at most 1 above (no cache
# holds more than it has; the octave is for the sweep's spacing and the slope of the fall).
MATCH_OCTAVES = 3.0
OVER_OCTAVES = 1.0
# A level is seen when the bandwidth steps down by at least 8% past it: the plateaus of the
# zen4-kvm-2cpu fixtures scatter by about 5% point to point, and their smallest real step (L2 to L3
# read at one thread) is 12%.
SEEN_RATIO = 1.08
FLAT_TOLERANCE = 0.05  # the DRAM plateau is flat when its two largest sizes read within 5% (issue 10)
LINE_BYTES = 64  # latency working sets are whole cache lines (common practice: 64-byte lines)


@dataclass(frozen=True)
class CacheCapacity:
    """What the OS says: a level and the bytes it holds for `threads` threads."""

    name: str  # "L1", "L2", ...
    bytes: int


@dataclass(frozen=True)
class Plateau:
    """One detected level: the sizes it spans and its bandwidth."""

    name: str  # an OS-reported level (L1, L2 ...), DRAM, or TRANSITION when no reported level fits
    first: int  # index of its first point in the curve
    last: int  # index of its last point
    sizes: tuple[int, ...]
    bytes_per_s: float  # median of the plateau's points
    edge_bytes: Optional[int]  # where its bandwidth is half-way to the next plateau's (the detected capacity)
    reported_bytes: Optional[int]  # the OS-reported capacity it was matched with


@dataclass(frozen=True)
class Flatness:
    """The end of a curve's DRAM plateau: bandwidth at its two largest sizes, flat within FLAT_TOLERANCE."""

    sizes: tuple[int, int]
    bytes_per_s: tuple[float, float]

    @property
    def spread(self) -> float:
        """How far apart the two are: larger / smaller - 1."""
        a, b = self.bytes_per_s
        return max(a, b) / min(a, b) - 1

    @property
    def flat(self) -> bool:
        return max(self.bytes_per_s) <= (1 + FLAT_TOLERANCE) * min(self.bytes_per_s)

    def note(self) -> Optional[str]:
        """None when flat, else the sentence a report shows."""
        if self.flat:
            return None
        (s0, s1), (b0, b1) = self.sizes, self.bytes_per_s
        why = ("the curve is still falling: the DRAM figures are possibly cache-assisted" if b0 > b1 else
               "the largest size reads faster: the host was probably busy during the sweep")
        return (f"the DRAM plateau is not flat: {format_rate(b0, 'B/s')} at {format_bytes(s0)}, "
                f"{format_rate(b1, 'B/s')} at {format_bytes(s1)} ({100 * self.spread:.0f} % apart, more than "
                f"{100 * FLAT_TOLERANCE:.0f} %); {why}")


def usable_capacities(reported: Sequence[CacheCapacity], shares: Optional[Mapping[str, tuple[int, int, int]]],
                      threads: int) -> list[CacheCapacity]:
    """The OS sizes scaled to what `threads` threads use: bytes per instance x instances they occupy.

    `shares` maps a level to (bytes per instance, CPUs sharing one, instances); without it the
    sizes stay as reported. Threads are assumed spread over instances, one per `shared` CPUs."""
    if not shares:
        return list(reported)
    out = []
    for c in reported:
        per_instance, shared, instances = shares.get(c.name, (c.bytes, 1, 1))
        used = min(max(1, instances or 1), max(1, math.ceil(threads / max(1, shared or 1))))
        out.append(CacheCapacity(c.name, per_instance * used))
    return out


def _squared_error(y: Sequence[float]):
    pre, pre2 = [0.0], [0.0]
    for v in y:
        pre.append(pre[-1] + v)
        pre2.append(pre2[-1] + v * v)

    def cost(i: int, j: int) -> float:  # points i..j
        s, s2, m = pre[j + 1] - pre[i], pre2[j + 1] - pre2[i], j + 1 - i
        return s2 - s * s / m

    return cost


def _fit(sizes: Sequence[int], y: Sequence[float], reported: Sequence[CacheCapacity],
         excluded: set[int]) -> tuple[tuple[Optional[int], int], ...]:
    """The curve's breaks as (level index, or None for a transition; last point before the break), levels
    in level order each within its window: the least squared error plus a penalty per break."""
    n, m, cost = len(y), len(reported), _squared_error(y)
    scale = 1 + n / 8
    transition, level = PENALTY * scale, LEVEL_PENALTY * scale
    windows: list[dict[int, float]] = []  # per level: break position -> its cost
    reach = 0
    for k, c in enumerate(reported):
        reach += c.bytes  # an exclusive hierarchy holds every level inside this one too
        octaves = {j: max(0.0, math.log2(c.bytes / sizes[j + 1]), math.log2(sizes[j] / reach)) for j in range(n - 1)}
        windows.append({} if k in excluded else
                       {j: level + scale * DISTANCE_PENALTY * d * d for j, d in octaves.items()
                        if d <= (MATCH_OCTAVES if sizes[j + 1] < c.bytes else OVER_OCTAVES)})
    # (next level that may be placed, last point before the last break) -> (cost, breaks)
    states: dict[tuple[int, int], tuple[float, tuple]] = {(0, -1): (0.0, ())}

    def offer(key, value):
        if key not in states or value[0] < states[key][0]:
            states[key] = value

    for e in range(MIN_POINTS - 1, n - MIN_POINTS):
        for (k, i), (err, breaks) in list(states.items()):
            if e - i < MIN_POINTS:
                continue
            err += cost(i + 1, e)
            offer((k, e), (err + transition, breaks + ((None, e),)))
            for k2 in (k2 for k2 in range(k, m) if e in windows[k2]):
                offer((k2 + 1, e), (err + windows[k2][e], breaks + ((k2, e),)))
    ends = [(err + cost(i + 1, n - 1), breaks) for (k, i), (err, breaks) in states.items() if n - 1 - i >= MIN_POINTS]
    return min(ends, key=lambda t: t[0])[1]


def _median(values: Sequence[float]) -> float:
    s = sorted(values)
    m = len(s) // 2
    return s[m] if len(s) % 2 else 0.5 * (s[m - 1] + s[m])


def detect_plateaus(sizes: Sequence[int], bytes_per_s: Sequence[float],
                    reported: Sequence[CacheCapacity] = (), dram_after: Optional[int] = None) -> list[Plateau]:
    """Plateaus of a curve sorted by size, each named after an OS-reported level (`reported` in level
    order, innermost first), DRAM (the last, once the curve reaches `dram_after` bytes) or TRANSITION."""
    if len(sizes) < 2:
        raise ValueError("a curve needs at least two points")
    y = [math.log2(v) for v in bytes_per_s]
    excluded: set[int] = set()
    while True:
        plateaus, steps = _named(sizes, bytes_per_s, reported, _fit(sizes, y, reported, excluded), dram_after)
        weak = [(step, k) for k, step in steps.items() if step < SEEN_RATIO]
        if not weak:
            return plateaus
        excluded.add(min(weak)[1])


def _named(sizes, values, reported, breaks, dram_after) -> tuple[list[Plateau], dict[int, float]]:
    """Plateaus from the fitted breaks, and each placed level's bandwidth step down to the next level.

    Between two level breaks (a region) the longest segment is the level, the others transitions; in
    the last region DRAM is the last segment."""
    n = len(sizes)
    spans = list(zip([0] + [b + 1 for _, b in breaks], [b for _, b in breaks] + [n - 1]))
    levels = [k for k, _ in breaks if k is not None]
    regions: list[list[int]] = [[]]
    for s, (k, _) in enumerate(breaks + ((None, n - 1),)):
        regions[-1].append(s)
        if k is not None:
            regions.append([])
    beyond = reported[levels[-1] + 1:] if levels else reported
    names = [(reported[k].name, reported[k].bytes) for k in levels] + [_last_name(sizes[-1], beyond, dram_after)]
    medians = [_median(values[i:j + 1]) for i, j in spans]
    chosen = [r[-1] if name == "DRAM" else max(r, key=lambda s: (spans[s][1] - spans[s][0], -s))
              for r, (name, _) in zip(regions, names)]
    plateaus = [Plateau(TRANSITION, i, j, tuple(sizes[i:j + 1]), medians[s], None, None)
                for s, (i, j) in enumerate(spans)]
    steps = {}
    for r, (s, (name, matched)) in enumerate(zip(chosen, names)):
        i, j = spans[s]
        edge = None if name == "DRAM" else sizes[n - 1]  # the curve ends inside this level: at least this
        if r + 1 < len(chosen):
            nxt = chosen[r + 1]
            steps[levels[r]] = medians[s] / medians[nxt]
            edge = _crossing(sizes, values, i, spans[nxt][1], math.sqrt(medians[s] * medians[nxt]),
                             spans[regions[r][-1]][1])
        plateaus[s] = Plateau(name, i, j, tuple(sizes[i:j + 1]), medians[s], edge, matched)
    return plateaus, steps


def _last_name(top: int, beyond: Sequence[CacheCapacity], dram_after: Optional[int]) -> tuple[str, Optional[int]]:
    """The last region: DRAM past `dram_after`, else the outermost level whose window the curve reached."""
    if dram_after is None or top >= dram_after:
        return "DRAM", None
    reached = [c for c in beyond if c.bytes / 2**MATCH_OCTAVES <= top]
    return (reached[-1].name, reached[-1].bytes) if reached else (TRANSITION, None)


def _crossing(sizes: Sequence[int], values: Sequence[float], first: int, last: int, target: float, near: int) -> int:
    """Size at which the curve falls through `target` between points first..last (log-interpolated), the
    fall nearest the break after point `near`: a level's capacity is where its bandwidth is half-way
    (geometrically) to the next level's."""
    falls = [p for p in range(first, last) if values[p] >= target > values[p + 1]]
    if not falls:
        return int(round(math.sqrt(sizes[near] * sizes[near + 1])))
    p = min(falls, key=lambda q: (abs(q - near), q))
    hi, lo = values[p], values[p + 1]
    f = math.log(hi / target) / math.log(hi / lo)
    return int(round(2 ** (math.log2(sizes[p]) + f * math.log2(sizes[p + 1] / sizes[p]))))


def not_seen(plateaus: Sequence[Plateau], reported: Sequence[CacheCapacity]) -> list[CacheCapacity]:
    """The OS-reported levels no plateau is named after: "not seen in the bandwidth curve"."""
    names = {p.name for p in plateaus}
    return [c for c in reported if c.name not in names]


def dram_flatness(sizes: Sequence[int], bytes_per_s: Sequence[float]) -> Flatness:
    """Whether a sweep curve (sorted by size) has stopped falling at its two largest sizes."""
    if len(sizes) < 2:
        raise ValueError("a curve needs at least two points")
    return Flatness((sizes[-2], sizes[-1]), (bytes_per_s[-2], bytes_per_s[-1]))


def latency_sizes(reported: Sequence[CacheCapacity], dram_bytes: int,
                  plateaus: Sequence[Plateau] = ()) -> dict[str, int]:
    """A chase working set inside each OS level and DRAM's: the geometric middle between the capacity of
    the level inside it (a quarter of its own for the first) and its own capacity.

    `reported` in level order for the thread count the chase runs on (one). A level smaller than the one
    inside it can only be exclusive: it ends at the sum of both. A detected edge below the reported
    capacity (a virtual machine reporting a whole socket's cache) tightens the upper bound."""
    edges = {p.name: p.edge_bytes for p in plateaus if p.edge_bytes}
    out, inner = {}, None
    for c in reported:
        low = inner if inner is not None else c.bytes // 4
        reach = c.bytes if c.bytes > low else low + c.bytes
        high = edges[c.name] if low < edges.get(c.name, 0) < reach else reach
        out[c.name] = max(low + LINE_BYTES, int(math.sqrt(low * high)) // LINE_BYTES * LINE_BYTES)
        inner = reach
    out["DRAM"] = dram_bytes
    return out


def level_of(size: int, plateaus: Sequence[Plateau], sizes: Sequence[int]) -> Optional[str]:
    """The level a sweep size was measured in (by the plateau that contains it)."""
    for p in plateaus:
        if sizes[p.first] <= size <= sizes[p.last]:
            return p.name
    return None


def representative(p: Plateau) -> int:
    """Index of the point that stands for a plateau: its middle, away from the transitions; for DRAM
    the largest (the sweep's top is the DRAM working set, 8x every cache of a socket)."""
    if p.name == "DRAM":
        return p.last
    return (p.first + p.last) // 2
