"""What a survey measures of the memory system, in what order: sweep, levels, ceilings, latency, strides.

The plan and the decisions (which sizes, which levels) are made here; every measurement is a
step of `eaves.memory_steps`, run by the supervisor's worker on two buffers it allocates once.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from typing import Callable, Optional, Sequence

from eaves import memory_steps as steps
from eaves.budget import MemoryBudget
from eaves.kernels import MEMORY_KERNELS, MemoryKernel
from eaves.levels import (TRANSITION, CacheCapacity, Plateau, detect_plateaus, dram_flatness, latency_sizes, level_of,
                          not_seen, representative, usable_capacities)
from eaves.memory_steps import Buffers
from eaves.records import Figure, StepFailure
from eaves.supervisor import SLOW_BYTES_PER_S, Steps, Supervisor, step_seconds
from eaves.timing import TimingPolicy
from eaves.units import format_bytes

Progress = Callable[[str], None]
MIN_SWEEP_BYTES = 4096
STRIDES = (1, 2, 4, 8, 16, 32)  # float64 elements: 8 B to 256 B
# A DRAM figure is taken at a working set of 8x every cache of a socket and at least 256 MiB (issue 10:
# smaller sets left a Zen 4 guest's DRAM read 2.4x above a C loop's, tests/fixtures/zen4-kvm-2cpu).
DRAM_CACHE_MULTIPLE = 8
DRAM_MIN_BYTES = 256 * 2**20
CACHE_ASSISTED = "possibly cache-assisted"  # the label of DRAM figures taken below the DRAM working set


@dataclass(frozen=True)
class MemoryPlan:
    """Sizes and thread counts a memory survey will use."""

    sizes: tuple[int, ...]  # working-set bytes of the sweep, log-spaced
    sweep_threads: tuple[int, ...]  # the sweep runs at each of these (1 and all, by default)
    scaling_threads: tuple[int, ...]  # thread-scaling at DRAM size
    buffer_bytes: int  # the first buffer; the second holds half as much
    top_bytes: int  # the largest working set: DRAM figures are taken here
    wanted_top_bytes: int  # --sweep-top, else dram_bytes_wanted; more than top_bytes if the budget cut it
    dram_bytes_wanted: int  # a working set no cache of a socket can hold (dram_working_set)
    policy: TimingPolicy
    points_per_octave: int
    numa_nodes: int = 1  # with more than one, buffers are touched again by each thread count

    @property
    def cache_assisted(self) -> bool:
        """True when the sweep stops below the DRAM working set: its DRAM figures may be helped by a cache."""
        return self.top_bytes < self.dram_bytes_wanted

    @property
    def honest_memory_bytes(self) -> int:
        """What the sweep must allocate (1.5x its top) to take DRAM figures at dram_bytes_wanted."""
        return 3 * self.dram_bytes_wanted // 2

    def dram_caution(self) -> Optional[str]:
        """None for honest DRAM figures, else the sentence every place showing them repeats."""
        if not self.cache_assisted:
            return None
        need = format_bytes(self.honest_memory_bytes)
        return (f"DRAM figures are possibly cache-assisted: taken at {format_bytes(self.top_bytes)}, below the "
                f"{format_bytes(self.dram_bytes_wanted)} no cache of a socket can hold ({DRAM_CACHE_MULTIPLE}x its "
                f"caches, at least {format_bytes(DRAM_MIN_BYTES)}); measuring there takes {need} "
                f"(--max-memory {need.replace(' ', '')})")


@dataclass
class MemoryResult:
    figures: list[Figure] = field(default_factory=list)
    plateaus: dict[int, list[Plateau]] = field(default_factory=dict)  # by thread count
    notes: list[str] = field(default_factory=list)
    failures: list[StepFailure] = field(default_factory=list)
    layout: dict = field(default_factory=dict)  # how the buffers sat: offset between them, chase pages


def dram_working_set(socket_cache_bytes: Optional[int]) -> int:
    """The smallest power of two no cache can hold: 8x a socket's caches, at least 256 MiB."""
    return 1 << math.ceil(math.log2(max(DRAM_MIN_BYTES, DRAM_CACHE_MULTIPLE * (socket_cache_bytes or 0))))


def plan_memory(llc_bytes: Optional[int], thread_counts: Sequence[int], budget: MemoryBudget,
                quick: bool, policy: Optional[TimingPolicy] = None,
                top_bytes: Optional[int] = None, points_per_octave: Optional[int] = None,
                numa_nodes: Optional[int] = None, socket_cache_bytes: Optional[int] = None) -> MemoryPlan:
    """Sweep from 4 KiB to the DRAM working set (of `socket_cache_bytes`, else of the last-level cache),
    or to `top_bytes`, in quick mode too; the memory budget halves the top until it fits."""
    dram = dram_working_set(socket_cache_bytes or llc_bytes)
    wanted = 1 << math.ceil(math.log2(top_bytes)) if top_bytes else dram
    top = wanted
    while 3 * top // 2 > budget.cap_bytes and top > 16 * MIN_SWEEP_BYTES:
        top //= 2
    budget.refuse_above(3 * top // 2, "the memory sweep")
    per_octave = points_per_octave or (1 if quick else 2)
    count = int(round(math.log2(top / MIN_SWEEP_BYTES) * per_octave)) + 1
    sizes = sorted({int(MIN_SWEEP_BYTES * 2 ** (k / per_octave)) // 128 * 128 for k in range(count)})
    counts = sorted(set(thread_counts))
    sweep_threads = tuple(sorted({counts[0], counts[-1]}))
    return MemoryPlan(tuple(sizes), sweep_threads, tuple(counts), buffer_bytes=top, top_bytes=top,
                      wanted_top_bytes=wanted, dram_bytes_wanted=dram,
                      policy=policy or (TimingPolicy.quick() if quick else TimingPolicy.full()),
                      points_per_octave=per_octave, numa_nodes=numa_nodes or 1)


def _bytes_per_figure(figures: list[Figure]) -> list[float]:
    # the best sample: another process stealing a core lowers rates, it never raises them
    return [f.best for f in figures]


def _size_text(size: int) -> str:
    return f"{size >> 20} MiB" if size >= 8 << 20 else f"{size >> 10} KiB"


class _Steps(Steps):
    """The memory survey's steps: deadlines from the plan, and the buffers' touch on a restarted worker."""

    def __init__(self, plan: MemoryPlan, runner, progress: Progress, result: MemoryResult):
        super().__init__(runner, progress, result.failures)
        self.plan, self.result = plan, result
        # a restarted worker allocates and touches the buffers again inside its next step
        self.touch_seconds = 1.5 * plan.buffer_bytes / SLOW_BYTES_PER_S

    def run(self, label: str, func, args: tuple, bytes_per_call: float, what: dict):  # type: ignore[override]
        seconds = step_seconds(self.plan.policy, bytes_per_call) + self.touch_seconds
        return super().run(label, func, args, seconds, what)

    def bandwidth(self, spec: Buffers, suite: str, kernel: MemoryKernel, size: int, threads: int,
                  label: str, guess: int = 1, warm: bool = True, level: Optional[str] = None,
                  retouch: bool = False) -> Optional[Figure]:
        what = {"suite": suite, "kernel": kernel.name, "variant": kernel.variant, "threads": threads,
                "working_set_bytes": size, "cache_level": level}
        return self.run(label, steps.bandwidth, (spec, suite, kernel.name, kernel.variant, size, threads,
                                                 self.plan.policy, guess, warm, level, retouch),
                        2 * size, what)


def measure_memory(plan: MemoryPlan, reported: Sequence[CacheCapacity], progress: Progress = lambda m: None,
                   shares: Optional[dict[str, tuple[int, int, int]]] = None,
                   sink: Optional[list[Figure]] = None, runner=None,
                   failures: Optional[list[StepFailure]] = None) -> MemoryResult:
    """Run every memory measurement of the plan; returns figures, detected levels and failed steps.

    `shares` maps a level name to (bytes per instance, CPUs sharing it, instances) so the OS
    sizes can be scaled to what `threads` threads can use; without it sizes are compared as
    reported. Finished figures are appended to `sink` and failed steps to `failures` as they
    come, so an interrupted survey keeps them. Every kernel runs in the `runner`'s worker
    (a Supervisor of its own when none is given).
    """
    result = MemoryResult(figures=sink if sink is not None else [],
                          failures=failures if failures is not None else [])
    own = runner is None
    runner = runner or Supervisor()
    try:
        _measure_all(plan, reported, shares, _Steps(plan, runner, progress, result))
    finally:
        if own:
            runner.close()
    return result


def _measure_all(plan: MemoryPlan, reported, shares, run: _Steps) -> None:
    result, policy = run.result, plan.policy
    caution = plan.dram_caution()
    if caution:
        result.notes.append(caution)
    sweep_kernels = [k for k in MEMORY_KERNELS if k.in_sweep]
    variant_kernels = [k for k in MEMORY_KERNELS if not k.in_sweep]
    first = plan.sweep_threads[0]
    spec = Buffers(plan.buffer_bytes, first)
    for threads in plan.sweep_threads:
        if threads == first or plan.numa_nodes > 1:
            spec = Buffers(plan.buffer_bytes, threads)
            run.run(f"first touch of {3 * plan.buffer_bytes >> 21} MiB with {threads} thread(s)", steps.touch,
                    (spec,), 0, {"suite": "setup", "threads": threads, "working_set_bytes": plan.buffer_bytes})
            offset = run.run("buffer layout", steps.buffer_offset, (spec,), 0, {"suite": "setup"})
            if offset is not None:
                result.layout["buffer_offset_mod_4096"] = offset
        curves: dict[str, list[Figure]] = {}
        for kernel in sweep_kernels:
            curve = curves.setdefault(kernel.name, [])
            guess, warm = 1, True
            for i, size in enumerate(plan.sizes):
                f = run.bandwidth(spec, "sweep", kernel, size, threads, f"sweep {kernel.name} {_size_text(size)} x{threads}",
                                  guess, warm)  # compiled at the first size, pages touched by bind
                if f is None:
                    guess, warm = 1, True  # a new worker compiles again
                    continue
                warm = False
                if i + 1 < len(plan.sizes):  # the next size needs about proportionally fewer repetitions
                    guess = max(1, f.repetitions * size // plan.sizes[i + 1])
                curve.append(f)
                result.figures.append(f)
        read = curves.get("read", [])
        if len(read) < 2:
            result.notes.append(f"x{threads}: the read sweep has fewer than two figures: no levels detected")
            continue
        sizes = [f.working_set_bytes for f in read]
        rates = _bytes_per_figure(read)
        capacities = usable_capacities(reported, shares, threads)
        biggest = max((c.bytes for c in capacities), default=0)
        plateaus = detect_plateaus(sizes, rates, capacities,
                                   dram_after=min(2 * biggest, plan.top_bytes) if biggest else None)
        result.plateaus[threads] = plateaus
        labelled = {id(f): _with_level(f, level_of(f.working_set_bytes, plateaus, sizes), caution)
                    for curve in curves.values() for f in curve}
        result.figures[:] = [labelled.get(id(f), f) for f in result.figures]
        levels = [p for p in plateaus if p.name != TRANSITION]
        for p in plateaus:
            if p.name == TRANSITION:
                result.notes.append(f"x{threads}: the curve from {_size_text(p.sizes[0])} to {_size_text(p.sizes[-1])} "
                                    f"reads unlike the levels around it (a transition); it is not reported as a level")
        for c in not_seen(plateaus, capacities):
            result.notes.append(f"x{threads}: {c.name} ({format_bytes(c.bytes)} as the OS reports it for {threads} "
                                f"thread(s)) is not seen in the bandwidth curve")
        if levels and levels[-1].name == "DRAM" and sizes[-1] == plan.top_bytes:
            flat = dram_flatness(sizes, rates).note()
            if flat:
                result.notes.append(f"x{threads}: {flat}")
        middles = latency_sizes(capacities, plan.top_bytes)  # from the OS's sizes alone: the same every run
        at = {p.name: level_size(p, middles.get(p.name), sizes) for p in levels}
        for curve in curves.values():
            for p in levels:
                ceiling = _ceiling(curve, p, *at[p.name])
                if ceiling is not None:
                    result.figures.append(_cautioned(ceiling, caution if p.name == "DRAM" else None))
        for p in levels:
            level_caution = caution if p.name == "DRAM" else None
            size = at[p.name][0]
            for kernel in variant_kernels:
                f = run.bandwidth(spec, "memory", kernel, size, threads, f"{p.name} {kernel.name} ({kernel.variant}) x{threads}",
                                  level=p.name)
                if f is not None:
                    result.figures.append(_cautioned(f, level_caution))
            f = run.run(f"{p.name} gather x{threads}", steps.gather, (spec, size, threads, policy, p.name),
                        8 * size, {"suite": "gather", "kernel": "gather", "threads": threads,
                                   "working_set_bytes": size, "cache_level": p.name})
            if f is not None:
                result.figures.append(_cautioned(f, level_caution))
        # strides at the DRAM working set (the sweep's top): no cache holds it
        for stride in STRIDES:
            f = run.run(f"stride {stride} x{threads}", steps.strided, (spec, plan.top_bytes, stride, threads, policy),
                        2 * plan.top_bytes, {"suite": "stride", "kernel": "stride-read", "threads": threads,
                                             "working_set_bytes": plan.top_bytes, "stride_elems": stride})
            if f is not None:
                result.figures.append(_cautioned(f, caution))
    result.figures.extend(_cautioned(f, caution) for f in _scaling(spec, plan, run, result.figures))
    if first in result.plateaus:
        # inside each OS-reported level, from the OS's sizes alone (the same in every run), on huge pages
        chase_sizes = latency_sizes(usable_capacities(reported, shares, 1), plan.top_bytes)
        for level, size in chase_sizes.items():
            if size > plan.top_bytes:
                result.notes.append(f"latency {level}: its working set ({_size_text(size)}) is above the sweep's top "
                                    f"({_size_text(plan.top_bytes)}): not measured")
                continue
            f = run.run(f"latency {level} (chase {_size_text(size)})", steps.chase,
                        (steps.ChaseBuffer(plan.top_bytes), size, policy, level),
                        4 * size, {"suite": "latency", "kernel": "chase", "threads": 1, "working_set_bytes": size,
                                   "cache_level": level})
            if f is not None:
                result.figures.append(_cautioned(f, caution if level == "DRAM" else None))
        pages = [f.extra for f in result.figures if f.suite == "latency" and "page_bytes" in f.extra]
        if pages:
            huge = min(p.get("huge_page_share", 0.0) for p in pages)
            result.layout["chase_huge_page_share"] = huge
            result.notes.append("latency: the chase ran on " + (
                f"2 MiB transparent huge pages ({huge:.0%} of its region)" if huge >= 0.9 else
                f"{format_bytes(pages[-1]['page_bytes'])} pages ({huge:.0%} in transparent huge pages: the OS did "
                "not grant more; TLB misses are part of the DRAM figure)"))


def _cautioned(f: Figure, caution: Optional[str]) -> Figure:
    """A DRAM figure taken below the DRAM working set carries the label wherever it is shown."""
    return replace(f, extra={**f.extra, "caution": CACHE_ASSISTED}) if caution else f


def _with_level(f: Figure, level: Optional[str], caution: Optional[str]) -> Figure:
    return _cautioned(replace(f, cache_level=level), caution if level == "DRAM" else None)


def level_size(p: Plateau, wanted: Optional[int], sweep_sizes: Sequence[int]) -> tuple[int, str]:
    """The working set a level is measured at, the same in every run: the sweep size nearest the
    middle of the level's OS-reported range (`wanted`, from `latency_sizes`), moved into the detected
    plateau only when that middle lies more than an octave outside it; and which rule chose it."""
    if wanted is None:
        return p.sizes[representative(p) - p.first], "middle of the detected plateau (the OS reports no size)"
    if p.name == "DRAM" or p.sizes[0] / 2 <= wanted <= 2 * p.sizes[-1]:
        # within an octave of the detected plateau: a plateau's ends move with noise from run to run,
        # the OS's sizes do not (one of ten runs cut a Zen 3 guest's L1 plateau short at 8 KiB)
        grid = p.sizes if p.name == "DRAM" else sweep_sizes
        return (min(grid, key=lambda s: (abs(math.log2(s / wanted)), s)),
                "the sweep size nearest the middle of the level's OS-reported range")
    nearest = min(p.sizes, key=lambda s: (abs(math.log2(s / wanted)), s))
    return nearest, "the OS-reported middle lies far outside the detected plateau: its nearest point"


def _ceiling(curve: list[Figure], p: Plateau, size: int, rule: str) -> Optional[Figure]:
    """The level's figure: the curve's point at the level's working set. None when that point failed."""
    on = [f for f in curve if f.working_set_bytes == size]
    if not on:
        return None
    return replace(on[0], suite="memory", cache_level=p.name,
                   extra={"plateau_sizes": list(p.sizes), "edge_bytes": p.edge_bytes,
                          "reported_bytes": p.reported_bytes, "working_set_rule": rule})


def _scaling(spec: Buffers, plan: MemoryPlan, run: _Steps, figures: list[Figure]) -> list[Figure]:
    """Plain kernels at the DRAM size at every thread count; sweep points are reused where they exist."""
    top = plan.sizes[-1]
    out = []
    for threads in plan.scaling_threads:
        for kernel in (k for k in MEMORY_KERNELS if k.in_sweep):
            reuse = [f for f in figures if f.suite == "sweep" and f.threads == threads
                     and f.kernel == kernel.name and f.working_set_bytes == top]
            if reuse:
                out.append(replace(reuse[0], suite="scaling"))
                continue
            f = run.bandwidth(spec, "scaling", kernel, top, threads, f"scaling {kernel.name} x{threads}",
                              level="DRAM", retouch=True)
            if f is not None:
                out.append(f)
    return out
