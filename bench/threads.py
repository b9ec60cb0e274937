"""Set the thread count of numba kernels and of the BLAS under numpy, for one measurement."""

from __future__ import annotations

import contextlib
import os
from typing import Iterator

from eaves.errors import InputError


def usable_cpus() -> int:
    """CPUs this process may run on (affinity mask), which can be fewer than the host has."""
    try:
        return len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        return os.cpu_count() or 1


def default_thread_counts(limit: int | None = None) -> list[int]:
    """1, 2, 4, ... up to and including every usable CPU."""
    top = limit or usable_cpus()
    counts, n = [], 1
    while n < top:
        counts.append(n)
        n *= 2
    counts.append(top)
    return counts


def check_thread_counts(counts: list[int]) -> list[int]:
    """Refuse 0, negatives and counts above the usable CPUs."""
    top = usable_cpus()
    for n in counts:
        if n < 1 or n > top:
            raise InputError(f"--threads: {n} is outside 1..{top} (this host lets eaves use {top} CPUs)")
    return sorted(set(counts))


@contextlib.contextmanager
def use_threads(n: int) -> Iterator[None]:
    """Run numba parallel regions and BLAS calls with `n` threads inside the block."""
    import numba
    from threadpoolctl import threadpool_limits

    previous = numba.get_num_threads()
    numba.set_num_threads(min(n, numba.config.NUMBA_NUM_THREADS))
    try:
        with threadpool_limits(limits=n):
            yield
    finally:
        numba.set_num_threads(previous)
