"""The microkernel registry: each entry declares the bytes it moves and how its checksum is verified.

Adding a memory kernel is one `MemoryKernel(...)` entry in `MEMORY_KERNELS`; the runner
iterates the registry and the tests are parametrized over it.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Optional

import numpy as np

from eaves.kernels import memory as mem
from eaves.kernels import streaming as nt
from eaves.kernels import vector as vec


def thread_slices(n: int, nthreads: int) -> list[tuple[int, int]]:
    """The (lo, hi) slice of every thread, exactly as the kernels compute it."""
    line = mem.LINE_ELEMS
    out = []
    for t in range(nthreads):
        lo = (t * n // nthreads) // line * line
        hi = n if t == nthreads - 1 else ((t + 1) * n // nthreads) // line * line
        out.append((lo, hi))
    return out


class BoundKernel:
    """A kernel bound to its buffers: `call(reps)` runs it, `expected(reps)` is its checksum."""

    def __init__(self, call: Callable[[int], float], expected: Callable[[int], float],
                 final_check: Optional[Callable[[], bool]] = None):
        self._call, self._expected, self._final = call, expected, final_check
        self.calls = 0

    def __call__(self, reps: int) -> tuple[float, float]:
        """Run `reps` repetitions; returns (checksum, expected checksum)."""
        want = self._expected(reps)
        got = self._call(reps)
        self.calls += 1
        return got, want

    def final_check(self) -> bool:
        """A full comparison of the buffers after the last call (outside any timing)."""
        return True if self._final is None else bool(self._final())


@dataclass(frozen=True)
class MemoryKernel:
    """A bandwidth kernel over one or two float64 arrays of `elems` elements each."""

    name: str  # read | write | copy | axpy
    variant: str  # how it loads or stores: vector N-bit | compiled loop | streaming store | libc memcpy
    arrays: int  # arrays in the working set
    read_bytes: int  # bytes read per element index (all arrays)
    write_bytes: int  # bytes written per element index
    in_sweep: bool  # measured at every working-set size, or only at the level ceilings
    bind: Callable[[np.ndarray, np.ndarray, int, int], BoundKernel]  # (a, b, elems, threads)
    description: str

    @property
    def bytes_per_elem(self) -> int:
        return self.read_bytes + self.write_bytes


PATTERN = 4093  # copy sources hold i % PATTERN: every element differs from its neighbours


def _bind_read(kernel):
    def bind(a, b, n, threads):
        x = a[:n]
        mem.first_touch(x, threads, 1.0)
        return BoundKernel(lambda r: kernel(x, r, threads), lambda r: float(r * n))
    return bind


def _bind_fill(kernel):
    def bind(a, b, n, threads):
        x = a[:n]
        slices = thread_slices(n, threads)
        last = [0]

        def call(r):
            last[0] = r
            return kernel(x, r, threads, 1.0)

        def expected(r):
            return float(sum(2 * (1.0 + r - 1) for _ in slices))

        return BoundKernel(call, expected, lambda: mem.count_not(x, 1.0 + last[0] - 1, threads) == 0)
    return bind


def _bind_copy(kernel):
    def bind(a, b, n, threads):
        src, dst = a[:n], b[:n]
        mem.fill_pattern(src, threads, PATTERN)
        mem.first_touch(dst, threads, -1.0)
        want = float(sum(src[lo] + src[hi - 1] for lo, hi in thread_slices(n, threads)))
        return BoundKernel(lambda r: kernel(dst, src, r, threads), lambda r: want,
                     lambda: mem.mismatches(dst, src, threads) == 0)
    return bind


def _bind_axpy(kernel):
    def bind(a, b, n, threads):
        x, y = a[:n], b[:n]
        mem.first_touch(x, threads, 1.0)
        mem.first_touch(y, threads, 0.0)
        done = [0]
        firsts = len(thread_slices(n, threads))

        def expected(r):
            done[0] += r
            return float(firsts * done[0])  # y == repetitions so far, read at each slice start

        return BoundKernel(lambda r: kernel(y, x, 1.0, r, threads), expected,
                     lambda: mem.count_not(y, float(done[0]), threads) == 0)
    return bind


WIDE = vec.WIDTH_LABEL  # explicit vectors at the host's full width
COMPILED = "compiled loop"  # numba's loop as LLVM vectorises it (may prefer narrower vectors)

MEMORY_KERNELS: tuple[MemoryKernel, ...] = (
    MemoryKernel("read", WIDE, 1, 8, 0, True, _bind_read(vec.read_sum), "sum of every element"),
    MemoryKernel("write", WIDE, 1, 0, 8, True, _bind_fill(vec.fill), "fill with ordinary stores"),
    MemoryKernel("copy", WIDE, 2, 8, 8, True, _bind_copy(vec.copy), "b[i] = a[i] with ordinary stores"),
    MemoryKernel("axpy", WIDE, 2, 16, 8, True, _bind_axpy(vec.axpy), "y[i] = alpha * x[i] + y[i]"),
    MemoryKernel("read", COMPILED, 1, 8, 0, False, _bind_read(mem.read_sum), "sum, as LLVM vectorises it"),
    MemoryKernel("write", COMPILED, 1, 0, 8, False, _bind_fill(mem.fill), "fill, as LLVM vectorises it"),
    MemoryKernel("copy", COMPILED, 2, 8, 8, False, _bind_copy(mem.copy), "copy, as LLVM vectorises it"),
    MemoryKernel("axpy", COMPILED, 2, 16, 8, False, _bind_axpy(mem.axpy), "axpy, as LLVM vectorises it"),
    MemoryKernel("write", "streaming store", 1, 0, 8, False, _bind_fill(nt.fill_stream),
                 "fill with streaming stores (no read for ownership)"),
    MemoryKernel("copy", "streaming store", 2, 8, 8, False, _bind_copy(nt.copy_stream),
                 "copy with streaming stores"),
    MemoryKernel("copy", "libc memcpy", 2, 8, 8, False, _bind_copy(nt.copy_memcpy),
                 "copy by the C library's memcpy, called per thread slice"),
)
