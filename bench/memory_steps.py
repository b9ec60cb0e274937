"""One memory measurement per call, run in the worker on buffers it keeps between calls.

Every function here is a survey step (see `eaves.supervisor`): plain, picklable arguments in, a
checked Figure out. The two buffers are allocated once per worker and first-touched by the
threads that stream them; every working set is a prefix of them.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Optional

import numpy as np

from eaves.errors import BrokenKernelError
from eaves.kernels import MEMORY_KERNELS, PATTERN, MemoryKernel, thread_slices
from eaves.kernels import memory as mem
from eaves.kernels.streaming import aligned_empty
from eaves.records import Figure
from eaves.threads import use_threads
from eaves.timing import TimingPolicy, sample

CHECK_TOLERANCE = 1e-9
PAGE_BYTES = 4096
ALIAS_OFFSET = 2048  # half a page between the buffers, modulo a page: as far from aliasing as it gets
HUGE_PAGE_BYTES = 2 << 20  # x86-64 and AArch64 (4 KiB granule) transparent huge pages (common practice)
GATHER_MAX_LOADS = 1 << 22  # random loads per gather call: about 0.4 s from DRAM on one core


@dataclass(frozen=True)
class Buffers:
    """The worker's buffers: the first of `bytes`, the second half as large, touched by `touch_threads`."""

    bytes: int
    touch_threads: int


_HELD: dict = {}  # this process's buffers: {"spec": Buffers, "a": array, "b": array}


def buffers(spec: Buffers, size: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """The arrays of `spec`, allocated and first-touched on first use (again after a worker restart).

    `size` is the working set the caller will use: one above the buffer is refused here, since the
    compiled kernels do not check their bounds."""
    if size > spec.bytes:
        raise ValueError(f"a working set of {size} B does not fit the {spec.bytes} B buffer")
    held = _HELD.get("spec")
    if held is None or held.bytes != spec.bytes:
        _HELD.clear()
        n = spec.bytes // 8
        a = aligned_empty(n)
        _HELD.update(a=a, b=_apart_from(a, n // 2))
        held = None
    if held != spec:
        with use_threads(spec.touch_threads):
            mem.first_touch(_HELD["a"], spec.touch_threads, 0.0)
            mem.first_touch(_HELD["b"], spec.touch_threads, 0.0)
        _HELD["spec"] = spec
    return _HELD["a"], _HELD["b"]


def _apart_from(a: np.ndarray, n: int) -> np.ndarray:
    """n float64 whose start is ALIAS_OFFSET bytes from `a`'s modulo a 4 KiB page: element i of one array
    and element i of the other never share the low 12 address bits, so a store to one is never
    mistaken for a load from the other (4 KiB aliasing, common practice)."""
    raw = np.empty(8 * n + PAGE_BYTES, np.uint8)
    shift = (a.ctypes.data + ALIAS_OFFSET - raw.ctypes.data) % PAGE_BYTES
    return raw[shift:shift + 8 * n].view(np.float64)


def buffer_offset(spec: Buffers) -> int:
    """(second buffer - first buffer) modulo 4 KiB, as allocated: recorded with the run."""
    a, b = buffers(spec)
    return (b.ctypes.data - a.ctypes.data) % PAGE_BYTES


@dataclass(frozen=True)
class ChaseBuffer:
    """The chase's own region of `bytes`, on transparent huge pages where the OS grants them."""

    bytes: int


def chase_region(spec: ChaseBuffer) -> np.ndarray:
    """The chase's array; the bandwidth buffers are released first, so the memory cap still holds."""
    if _HELD.get("chase_spec") != spec:
        _HELD.clear()
        _HELD.update(chase=huge_page_array(spec.bytes), chase_spec=spec)
    return _HELD["chase"]


def huge_page_array(nbytes: int) -> np.ndarray:
    """float64 on anonymous memory aligned to 2 MiB and marked MADV_HUGEPAGE before its first touch, so a
    kernel with transparent huge pages in "madvise" or "always" mode backs it with 2 MiB pages."""
    import mmap

    region = mmap.mmap(-1, nbytes + HUGE_PAGE_BYTES, flags=mmap.MAP_PRIVATE | mmap.MAP_ANONYMOUS)
    if hasattr(mmap, "MADV_HUGEPAGE"):
        try:
            region.madvise(mmap.MADV_HUGEPAGE)
        except OSError:
            pass  # the OS refuses: 4 KiB pages, and page_sizes() says so
    raw = np.frombuffer(region, dtype=np.uint8)
    shift = (-raw.ctypes.data) % HUGE_PAGE_BYTES
    out = raw[shift:shift + nbytes].view(np.float64)
    mem.first_touch(out, 1, 0.0)
    return out


def touch(spec: Buffers) -> None:
    """Allocate and first-touch the buffers (its own step: on a virtual machine it takes seconds)."""
    buffers(spec)


def kernel_named(name: str, variant: str) -> MemoryKernel:
    for k in MEMORY_KERNELS:
        if k.name == name and k.variant == variant:
            return k
    raise KeyError(f"no memory kernel {name}/{variant}")


def elems_of(kernel: MemoryKernel, size: int) -> int:
    return size // (8 * kernel.arrays) // 8 * 8


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


def bandwidth(spec: Buffers, suite: str, name: str, variant: str, size: int, threads: int, policy: TimingPolicy,
              guess: int = 1, warm: bool = True, level: Optional[str] = None, retouch: bool = False) -> Figure:
    """One bandwidth kernel at one working set and thread count (a sweep point, a level's variant, scaling)."""
    a, b = buffers(spec, size)
    kernel = kernel_named(name, variant)
    elems = elems_of(kernel, size)
    with use_threads(threads):
        if retouch:
            mem.first_touch(a, threads, 0.0)
        bound = kernel.bind(a, b, elems, threads)
        timing = _measure(bound, policy, f"{name}/{variant} at {size} B x{threads}", guess, warm=warm)
    return _figure(suite, kernel, threads, size, timing, elems, policy, cache_level=level)


def gather(spec: Buffers, size: int, threads: int, policy: TimingPolicy, level: str) -> Figure:
    """Random gather over the working set: data at pseudo-random int64 indices (a cache line per load).

    The index holds at most GATHER_MAX_LOADS entries, so a DRAM working set of gigabytes is
    still sampled in seconds; the data region is the rest of the working set."""
    a, b = buffers(spec, size)
    loads = min(size // 16 // 8 * 8, GATHER_MAX_LOADS)
    n = (size - 8 * loads) // 8 // 8 * 8
    data = a[:n]
    with use_threads(threads):
        mem.fill_pattern(data, threads, PATTERN)
        index = b[:loads].view(np.int64)
        mem.random_indices(index, n, 7, threads)
        want = mem.pattern_sum_at(index, PATTERN, threads)

        def call(r):
            return mem.gather_sum(data, index, r, threads), want * r

        timing = _checked(call, policy, f"gather at {size} B")
    return Figure(suite="gather", kernel="gather", dtype="fp64", threads=threads, unit="bytes_per_s",
                  samples=timing.rates(16 * loads), repetitions=timing.repetitions,
                  min_seconds=policy.min_seconds, working_set_bytes=8 * (n + loads), cache_level=level,
                  variant="int64 index",
                  extra={"line_bytes_per_s": list(timing.rates(72 * loads)),  # a whole line per random load
                         "useful_bytes_per_element": 16, "loads": loads, "data_bytes": 8 * n})


def strided(spec: Buffers, size: int, stride: int, threads: int, policy: TimingPolicy,
            level: Optional[str] = "DRAM") -> Figure:
    """Every `stride`-th float64 of the working set, summed."""
    a, _ = buffers(spec, size)
    n = size // 8 // 8 * 8
    x = a[:n]
    with use_threads(threads):
        mem.first_touch(x, threads, 1.0)
        visited = sum((hi - lo + stride - 1) // stride for lo, hi in thread_slices(n, threads))
        lines = visited if stride >= mem.LINE_ELEMS else n // mem.LINE_ELEMS

        def call(r):
            return mem.strided_sum(x, stride, r, threads), float(visited * r)

        timing = _checked(call, policy, f"stride {stride} at {size} B")
    return Figure(suite="stride", kernel="stride-read", dtype="fp64", threads=threads, unit="bytes_per_s",
                  samples=timing.rates(8 * visited), repetitions=timing.repetitions,
                  min_seconds=policy.min_seconds, working_set_bytes=size, cache_level=level,
                  stride_elems=stride,
                  extra={"line_bytes_per_s": list(timing.rates(64 * lines)), "stride_bytes": 8 * stride})


class ChaseWalk:
    """The chase as a timed call that goes on around the cycle from where the last call stopped.

    Restarting every call at the same slot would walk the same first lines again and again: at a DRAM
    working set a sample of 5 ms covers only a few MiB of the cycle, which the last-level cache then
    holds, so the "DRAM" latency fell towards the L3's (39 ns against 115-130 ns on a Zen 3 guest, and
    moving from run to run with what the neighbours evicted). Walking on, each load of a DRAM-sized
    cycle reaches a line not touched since the cycle was built; a cache-sized cycle stays resident.
    """

    def __init__(self, nxt: np.ndarray, order: np.ndarray):
        self.nxt, self.order, self.position = nxt, order, 0

    def __call__(self, loads: int) -> tuple[int, int]:
        """(where the chase ended, where the cycle says it must end) after `loads` more loads."""
        slots = self.order.shape[0]
        start = int(self.order[self.position]) * mem.LINE_ELEMS
        self.position = (self.position + loads) % slots
        return int(mem.chase(self.nxt, start, loads)), int(self.order[self.position]) * mem.LINE_ELEMS


def chase(spec: ChaseBuffer, size: int, policy: TimingPolicy, level: str) -> Figure:
    """Dependent loads around a random cycle, one pointer per cache line: nanoseconds per load."""
    if size > spec.bytes:
        raise ValueError(f"a working set of {size} B does not fit the {spec.bytes} B chase region")
    a = chase_region(spec)
    n = size // 8 // 8 * 8
    nxt = a[:n].view(np.int64)
    slots = n // mem.LINE_ELEMS
    order = np.random.default_rng(11).permutation(slots).astype(np.int64)
    mem.build_cycle(nxt, order, mem.LINE_ELEMS)
    walk = ChaseWalk(nxt, order)
    timing = _checked(walk, policy, f"chase at {size} B", exact=True)
    extra = {"slots": int(slots), "spacing_bytes": 64, **page_sizes(nxt)}
    return Figure(suite="latency", kernel="chase", dtype="int64", threads=1, unit="ns_per_load",
                  samples=tuple(s * 1e9 for s in timing.seconds), repetitions=timing.repetitions,
                  min_seconds=policy.min_seconds, working_set_bytes=size, cache_level=level, extra=extra)


def page_sizes(array: np.ndarray) -> dict:
    """Which pages back `array`, from the kernel's own account (/proc/self/smaps): the base page size and
    how much of its mapping transparent huge pages cover. Only the base size where the OS does not say."""
    import mmap

    start = array.ctypes.data
    out: dict = {"page_bytes": mmap.PAGESIZE}
    try:
        with open("/proc/self/smaps") as f:
            inside, rss = False, 0
            for line in f:
                head = line.split()
                if ":" not in head[0]:  # a mapping's first line: "lo-hi perms offset dev inode [path]"
                    lo, hi = (int(x, 16) for x in head[0].split("-"))
                    inside = lo <= start < hi
                elif inside and head[0] == "Rss:":
                    rss = int(head[1]) * 1024
                elif inside and head[0] == "AnonHugePages:":
                    huge = int(head[1]) * 1024
                    out.update(huge_page_bytes_in_mapping=huge, huge_page_share=round(huge / rss, 3) if rss else 0.0)
                    break
    except (OSError, ValueError, IndexError):
        pass
    return out


def _checked(call, policy, what, exact=False):
    timing = sample(call, policy)
    for got, want in timing.results:
        ok = got == want if exact else math.isclose(got, want, rel_tol=CHECK_TOLERANCE)
        if not ok:
            raise BrokenKernelError(f"{what}: checksum {got!r} differs from the expected {want!r}")
    return timing
