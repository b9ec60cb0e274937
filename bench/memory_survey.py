"""What a survey measures of the memory system, in what order: sweep, levels, ceilings, latency, strides.

Two buffers of the sweep's top size are allocated once (within the memory budget) and
first-touched by the threads that stream them; every smaller working set is a prefix.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Callable, Optional, Sequence

import numpy as np

from eaves.budget import MemoryBudget
from eaves.errors import BrokenKernelError
from eaves.kernels import MEMORY_KERNELS, PATTERN, MemoryKernel, thread_slices
from eaves.kernels import memory as mem
from eaves.kernels.streaming import aligned_empty
from eaves.levels import CacheCapacity, Plateau, detect_plateaus, level_of, representative
from eaves.records import Figure
from eaves.threads import use_threads
from eaves.timing import TimingPolicy, sample

Progress = Callable[[str], None]
MIN_SWEEP_BYTES = 4096
STRIDES = (1, 2, 4, 8, 16, 32)  # float64 elements: 8 B to 256 B
CHECK_TOLERANCE = 1e-9


@dataclass(frozen=True)
class MemoryPlan:
    """Sizes and thread counts a memory survey will use."""

    sizes: tuple[int, ...]  # working-set bytes of the sweep, log-spaced
    sweep_threads: tuple[int, ...]  # the sweep runs at each of these (1 and all, by default)
    scaling_threads: tuple[int, ...]  # thread-scaling at DRAM size
    buffer_bytes: int  # the first buffer; the second holds half as much
    top_bytes: int
    wanted_top_bytes: int  # 4 (quick: 2) x last-level cache; more than top_bytes if the budget cut it
    policy: TimingPolicy
    points_per_octave: int
    numa_nodes: int = 1  # with more than one, buffers are touched again by each thread count


@dataclass
class MemoryResult:
    figures: list[Figure] = field(default_factory=list)
    plateaus: dict[int, list[Plateau]] = field(default_factory=dict)  # by thread count
    notes: list[str] = field(default_factory=list)


def plan_memory(llc_bytes: Optional[int], thread_counts: Sequence[int], budget: MemoryBudget,
                quick: bool, policy: Optional[TimingPolicy] = None,
                top_bytes: Optional[int] = None, points_per_octave: Optional[int] = None,
                numa_nodes: Optional[int] = None) -> MemoryPlan:
    """Sweep from 4 KiB to 4x the last-level cache (2x in quick mode), capped by the memory budget."""
    wanted = top_bytes or (2 if quick else 4) * (llc_bytes or 32 * 2**20)
    wanted = 1 << math.ceil(math.log2(wanted))
    top = wanted
    while 3 * top // 2 > budget.cap_bytes and top > 16 * MIN_SWEEP_BYTES:
        top //= 2
    budget.refuse_above(3 * top // 2, "the memory sweep")
    per_octave = points_per_octave or (1 if quick else 2)
    count = int(round(math.log2(top / MIN_SWEEP_BYTES) * per_octave)) + 1
    sizes = sorted({int(MIN_SWEEP_BYTES * 2 ** (k / per_octave)) // 128 * 128 for k in range(count)})
    counts = sorted(set(thread_counts))
    sweep_threads = tuple(sorted({counts[0], counts[-1]}))
    return MemoryPlan(tuple(sizes), sweep_threads, tuple(counts), top, top, wanted,
                      policy or (TimingPolicy.quick() if quick else TimingPolicy.full()), per_octave,
                      numa_nodes or 1)


def _measure(bound, policy: TimingPolicy, what: str, start: int = 1, warm: bool = True):
    timing = sample(bound, policy, start=start, warm=warm)
    for got, want in timing.results:
        if not math.isclose(got, want, rel_tol=CHECK_TOLERANCE, abs_tol=1e-6):
            raise BrokenKernelError(f"{what}: checksum {got!r} differs from the expected {want!r}")
    if not bound.final_check():
        raise BrokenKernelError(f"{what}: buffers after the run differ from the expected result")
    return timing


def _figure(suite, kernel: MemoryKernel, threads, size, timing, elems, policy, **kw) -> Figure:
    work = kernel.bytes_per_elem * elems
    return Figure(suite=suite, kernel=kernel.name, dtype="fp64", threads=threads, unit="bytes_per_s",
                  samples=timing.rates(work), repetitions=timing.repetitions,
                  min_seconds=policy.min_seconds, working_set_bytes=size, variant=kernel.variant, **kw)


def _bytes_per_figure(figures: list[Figure]) -> list[float]:
    # the best sample: another process stealing a core lowers rates, it never raises them
    return [f.best for f in figures]


def measure_memory(plan: MemoryPlan, reported: Sequence[CacheCapacity], progress: Progress = lambda m: None,
                   shares: Optional[dict[str, tuple[int, int, int]]] = None,
                   sink: Optional[list[Figure]] = None) -> MemoryResult:
    """Run every memory measurement of the plan; returns figures and the detected levels.

    `shares` maps a level name to (bytes per instance, CPUs sharing it, instances) so the OS
    sizes can be scaled to what `threads` threads can use; without it sizes are compared as
    reported. Finished figures are appended to `sink` as they come, so an interrupted survey
    keeps them.
    """
    result = MemoryResult(figures=sink if sink is not None else [])
    n_top = plan.buffer_bytes // 8
    a = aligned_empty(n_top)
    b = aligned_empty(n_top // 2)  # two-array kernels (copy, axpy, gather) split the working set
    policy = plan.policy
    if plan.top_bytes < plan.wanted_top_bytes:
        result.notes.append(f"the sweep stops at {plan.top_bytes >> 20} MiB, below the {plan.wanted_top_bytes >> 20} MiB "
                            f"it wanted (a multiple of the last-level cache): raise --max-memory for a DRAM figure")
    sweep_kernels = [k for k in MEMORY_KERNELS if k.in_sweep]
    variant_kernels = [k for k in MEMORY_KERNELS if not k.in_sweep]
    for threads in plan.sweep_threads:
        with use_threads(threads):
            if threads == plan.sweep_threads[0] or plan.numa_nodes > 1:
                progress(f"first touch of {3 * plan.buffer_bytes >> 21} MiB with {threads} thread(s)")
                mem.first_touch(a, threads, 0.0)
                mem.first_touch(b, threads, 0.0)
            curves: dict[str, list[Figure]] = {}
            for kernel in sweep_kernels:
                curve = curves.setdefault(kernel.name, [])
                guess = 1
                for i, size in enumerate(plan.sizes):
                    elems = size // (8 * kernel.arrays) // 8 * 8
                    progress(f"sweep {kernel.name} {size >> 10} KiB x{threads}")
                    bound = kernel.bind(a, b, elems, threads)
                    timing = _measure(bound, policy, f"{kernel.name}/{kernel.variant} at {size} B", guess,
                                      warm=i == 0)  # compiled at the first size, pages touched by bind
                    if i + 1 < len(plan.sizes):  # the next size needs about proportionally fewer repetitions
                        guess = max(1, timing.repetitions * size // plan.sizes[i + 1])
                    curve.append(_figure("sweep", kernel, threads, size, timing, elems, policy))
                    result.figures.append(curve[-1])
            capacities = _capacities(reported, shares, threads)
            plateaus = detect_plateaus(plan.sizes, _bytes_per_figure(curves["read"]), capacities,
                                       dram_after=2 * max((c.bytes for c in capacities), default=0) or None)
            result.plateaus[threads] = plateaus
            labelled = {id(f): _with_level(f, level_of(f.working_set_bytes, plateaus, plan.sizes))
                        for curve in curves.values() for f in curve}
            result.figures[:] = [labelled.get(id(f), f) for f in result.figures]
            levels = [p for p in plateaus if p.name != "L?"]
            for p in plateaus:
                if p.name == "L?":
                    result.notes.append(
                        f"x{threads}: a plateau from {p.sizes[0] >> 10} to {p.sizes[-1] >> 10} KiB matches no cache "
                        f"the OS reports (a transition between levels?); it is not reported as a level")
            for curve in curves.values():
                for p in levels:
                    result.figures.append(_ceiling(curve, p))
            for p in levels:
                size = plan.sizes[representative(p)]
                for kernel in variant_kernels:
                    elems = size // (8 * kernel.arrays) // 8 * 8
                    progress(f"{p.name} {kernel.name} ({kernel.variant}) x{threads}")
                    bound = kernel.bind(a, b, elems, threads)
                    timing = _measure(bound, policy, f"{kernel.name}/{kernel.variant} at {size} B")
                    result.figures.append(_figure("memory", kernel, threads, size, timing, elems, policy,
                                                  cache_level=p.name))
                progress(f"{p.name} gather x{threads}")
                # DRAM: the smallest size already past every cache (random loads are slow to sample)
                gather_size = plan.sizes[p.first] if p.name == "DRAM" else size
                result.figures.append(_gather(a, b, gather_size, threads, policy, p.name))
            dram = [p for p in levels if p.name == "DRAM"]
            stride_size = plan.sizes[dram[0].first] if dram else plan.sizes[-1]
            for stride in STRIDES:
                progress(f"stride {stride} x{threads}")
                result.figures.append(_strided(a, stride_size, stride, threads, policy))
    one = plan.sweep_threads[0]
    for p in (p for p in result.plateaus[one] if p.name != "L?"):
        progress(f"latency {p.name}")
        result.figures.append(_chase(a, plan.sizes[representative(p)], policy, p.name))
    result.figures.extend(_scaling(a, b, plan, progress, result.figures))
    return result


def _capacities(reported: Sequence[CacheCapacity], shares, threads: int) -> list[CacheCapacity]:
    if not shares:
        return list(reported)
    out = []
    for c in reported:
        per_instance, shared, instances = shares.get(c.name, (c.bytes, 1, 1))
        used = min(max(1, instances or 1), max(1, math.ceil(threads / max(1, shared or 1))))
        out.append(CacheCapacity(c.name, per_instance * used))
    return out


def _with_level(f: Figure, level: Optional[str]) -> Figure:
    from dataclasses import replace

    return replace(f, cache_level=level)


def _ceiling(curve: list[Figure], p: Plateau) -> Figure:
    """The level's figure: for a cache the point of median bandwidth among the plateau's inner
    points; for DRAM its representative point, where the variants and the latency are measured too
    (a DRAM plateau often begins with a point still helped by the last cache)."""
    from dataclasses import replace

    inner = curve[p.first + 1:p.last] if p.last - p.first >= 3 else curve[p.first:p.last + 1]
    chosen = curve[representative(p)] if p.name == "DRAM" else sorted(inner, key=lambda f: f.median)[len(inner) // 2]
    return replace(chosen, suite="memory", cache_level=p.name,
                   extra={"plateau_sizes": list(p.sizes), "edge_bytes": p.edge_bytes,
                          "reported_bytes": p.reported_bytes})


def _gather(a, b, size, threads, policy, level) -> Figure:
    """Random gather: half the working set is data, half a pseudo-random int64 index into it."""
    n = size // 16 // 8 * 8
    data = a[:n]
    mem.fill_pattern(data, threads, PATTERN)
    index = b[:n].view(np.int64)
    mem.random_indices(index, n, 7, threads)
    want = mem.pattern_sum_at(index, PATTERN, threads)

    def call(r):
        return mem.gather_sum(data, index, r, threads), want * r

    timing = _checked(call, policy, f"gather at {size} B")
    return Figure(suite="gather", kernel="gather", dtype="fp64", threads=threads, unit="bytes_per_s",
                  samples=timing.rates(16 * n), repetitions=timing.repetitions,
                  min_seconds=policy.min_seconds, working_set_bytes=size, cache_level=level,
                  variant="int64 index",
                  extra={"line_bytes_per_s": list(timing.rates(72 * n)),  # a whole line per random load
                         "useful_bytes_per_element": 16})


def _strided(a, size, stride, threads, policy) -> Figure:
    n = size // 8 // 8 * 8
    x = a[:n]
    mem.first_touch(x, threads, 1.0)
    visited = sum((hi - lo + stride - 1) // stride for lo, hi in thread_slices(n, threads))
    lines = visited if stride >= mem.LINE_ELEMS else n // mem.LINE_ELEMS

    def call(r):
        return mem.strided_sum(x, stride, r, threads), float(visited * r)

    timing = _checked(call, policy, f"stride {stride} at {size} B")
    return Figure(suite="stride", kernel="stride-read", dtype="fp64", threads=threads, unit="bytes_per_s",
                  samples=timing.rates(8 * visited), repetitions=timing.repetitions,
                  min_seconds=policy.min_seconds, working_set_bytes=size, cache_level="DRAM",
                  stride_elems=stride,
                  extra={"line_bytes_per_s": list(timing.rates(64 * lines)), "stride_bytes": 8 * stride})


def _chase(a, size, policy, level) -> Figure:
    n = size // 8 // 8 * 8
    nxt = a[:n].view(np.int64)
    slots = n // mem.LINE_ELEMS
    order = np.random.default_rng(11).permutation(slots).astype(np.int64)
    mem.build_cycle(nxt, order, mem.LINE_ELEMS)
    start = int(order[0]) * mem.LINE_ELEMS

    def call(loads):
        return int(mem.chase(nxt, start, loads)), int(order[loads % slots]) * mem.LINE_ELEMS

    timing = _checked(call, policy, f"chase at {size} B", exact=True)
    return Figure(suite="latency", kernel="chase", dtype="int64", threads=1, unit="ns_per_load",
                  samples=tuple(s * 1e9 for s in timing.seconds), repetitions=timing.repetitions,
                  min_seconds=policy.min_seconds, working_set_bytes=size, cache_level=level,
                  extra={"slots": int(slots), "spacing_bytes": 64})


def _checked(call, policy, what, exact=False):
    timing = sample(call, policy)
    for got, want in timing.results:
        ok = got == want if exact else math.isclose(got, want, rel_tol=CHECK_TOLERANCE)
        if not ok:
            raise BrokenKernelError(f"{what}: checksum {got!r} differs from the expected {want!r}")
    return timing


def _scaling(a, b, plan: MemoryPlan, progress: Progress, figures: list[Figure]) -> list[Figure]:
    """Plain kernels at the DRAM size at every thread count; sweep points are reused where they exist."""
    from dataclasses import replace

    top = plan.sizes[-1]
    out = []
    for threads in plan.scaling_threads:
        for kernel in (k for k in MEMORY_KERNELS if k.in_sweep):
            reuse = [f for f in figures if f.suite == "sweep" and f.threads == threads
                     and f.kernel == kernel.name and f.working_set_bytes == top]
            if reuse:
                out.append(replace(reuse[0], suite="scaling"))
                continue
            elems = top // (8 * kernel.arrays) // 8 * 8
            progress(f"scaling {kernel.name} x{threads}")
            with use_threads(threads):
                mem.first_touch(a, threads, 0.0)
                bound = kernel.bind(a, b, elems, threads)
                timing = _measure(bound, plan.policy, f"{kernel.name} at {top} B x{threads}")
            out.append(_figure("scaling", kernel, threads, top, timing, elems, plan.policy, cache_level="DRAM"))
    return out
