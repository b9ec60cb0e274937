"""Bandwidth and latency microkernels (numba): every thread streams its own contiguous slice.

Every kernel repeats its pass `reps` times inside one parallel region, so a timed call pays
the region launch once, and returns a checksum the runner verifies against a closed form.
Float sums are compiled with `reassoc` (so they vectorise with several accumulators) and
`contract` (so a*x+y becomes a fused multiply-add). Loops index per-thread views from 0:
numba's negative-index wraparound on `a[lo + i]` turns vector loads into gathers.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

FAST = {"reassoc", "contract", "nsz", "arcp"}
LINE_ELEMS = 8  # float64 elements in a 64-byte cache line: slices start on line boundaries


@njit(inline="always")
def _slice(t, nthreads, n):
    lo = (t * n // nthreads) // LINE_ELEMS * LINE_ELEMS
    hi = n if t == nthreads - 1 else ((t + 1) * n // nthreads) // LINE_ELEMS * LINE_ELEMS
    return lo, hi


@njit(parallel=True, fastmath=FAST, cache=True)
def read_sum(a, reps, nthreads):
    """Sum of every element, `reps` times; with a == 1 the result is reps * len(a)."""
    partial = np.zeros(nthreads)
    for t in prange(nthreads):
        lo, hi = _slice(t, nthreads, a.shape[0])
        x = a[lo:hi]
        total = 0.0
        for _ in range(reps):
            s = 0.0
            for i in range(x.shape[0]):
                s += x[i]
            total += s
        partial[t] = total
    return partial.sum()


@njit(parallel=True, fastmath=FAST, cache=True)
def fill(a, reps, nthreads, base):
    """Write base + r over the whole array in pass r; returns the first and last value of each slice."""
    partial = np.zeros(nthreads)
    for t in prange(nthreads):
        lo, hi = _slice(t, nthreads, a.shape[0])
        x = a[lo:hi]
        for r in range(reps):
            v = base + r
            for i in range(x.shape[0]):
                x[i] = v
        partial[t] = x[0] + x[-1]
    return partial.sum()


@njit(parallel=True, fastmath=FAST, cache=True)
def copy(dst, src, reps, nthreads):
    """dst[:] = src[:], `reps` times; returns the first and last copied value of each slice."""
    partial = np.zeros(nthreads)
    for t in prange(nthreads):
        lo, hi = _slice(t, nthreads, src.shape[0])
        d = dst[lo:hi]
        s = src[lo:hi]
        for _ in range(reps):
            for i in range(s.shape[0]):
                d[i] = s[i]
        partial[t] = d[0] + d[-1]
    return partial.sum()


@njit(parallel=True, fastmath=FAST, cache=True)
def axpy(y, x, alpha, reps, nthreads):
    """y = alpha * x + y, `reps` times; returns the first element of each slice."""
    partial = np.zeros(nthreads)
    for t in prange(nthreads):
        lo, hi = _slice(t, nthreads, x.shape[0])
        yy = y[lo:hi]
        xx = x[lo:hi]
        for _ in range(reps):
            for i in range(xx.shape[0]):
                yy[i] = alpha * xx[i] + yy[i]
        partial[t] = yy[0]
    return partial.sum()


@njit(parallel=True, fastmath=FAST, cache=True)
def strided_sum(a, stride, reps, nthreads):
    """Sum of every `stride`-th element of each slice, `reps` times."""
    partial = np.zeros(nthreads)
    for t in prange(nthreads):
        lo, hi = _slice(t, nthreads, a.shape[0])
        x = a[lo:hi]
        m = (x.shape[0] + stride - 1) // stride
        total = 0.0
        for _ in range(reps):
            s = 0.0
            for k in range(m):
                s += x[k * stride]
            total += s
        partial[t] = total
    return partial.sum()


@njit(parallel=True, fastmath=FAST, cache=True)
def gather_sum(a, index, reps, nthreads):
    """Sum of a[index[i]] over each thread's slice of the index array, `reps` times."""
    partial = np.zeros(nthreads)
    for t in prange(nthreads):
        lo, hi = _slice(t, nthreads, index.shape[0])
        idx = index[lo:hi]
        total = 0.0
        for _ in range(reps):
            s = 0.0
            for i in range(idx.shape[0]):
                s += a[idx[i]]
            total += s
        partial[t] = total
    return partial.sum()


@njit(cache=True)
def chase(nxt, start, loads):
    """Follow `loads` dependent pointers from `start`; each load's address is the last load's value."""
    p = start
    for _ in range(loads):
        p = nxt[p]
    return p


@njit(cache=True)
def build_cycle(nxt, order, spacing):
    """Link slots order[0] -> order[1] -> ... -> order[0], one slot every `spacing` elements."""
    m = order.shape[0]
    for j in range(m):
        nxt[order[j] * spacing] = order[(j + 1) % m] * spacing


@njit(parallel=True, cache=True)
def first_touch(a, nthreads, value):
    """Write every page from the thread that will later stream it (places pages on its NUMA node)."""
    for t in prange(nthreads):
        lo, hi = _slice(t, nthreads, a.shape[0])
        x = a[lo:hi]
        for i in range(x.shape[0]):
            x[i] = value


@njit(parallel=True, cache=True)
def fill_pattern(a, nthreads, modulus):
    """a[i] = i % modulus (an integer modulus), in place and in parallel (no temporary the size of
    the buffer)."""
    for t in prange(nthreads):
        lo, hi = _slice(t, nthreads, a.shape[0])
        for i in range(lo, hi):
            a[i] = float(i % modulus)


@njit(parallel=True, cache=True)
def mismatches(x, y, nthreads):
    """How many positions differ between x and y (a full check of a copy, in parallel)."""
    partial = np.zeros(nthreads, dtype=np.int64)
    for t in prange(nthreads):
        lo, hi = _slice(t, nthreads, x.shape[0])
        c = 0
        for i in range(lo, hi):
            if x[i] != y[i]:
                c += 1
        partial[t] = c
    return partial.sum()


@njit(parallel=True, cache=True)
def count_not(x, value, nthreads):
    """How many elements of x differ from value."""
    partial = np.zeros(nthreads, dtype=np.int64)
    for t in prange(nthreads):
        lo, hi = _slice(t, nthreads, x.shape[0])
        c = 0
        for i in range(lo, hi):
            if x[i] != value:
                c += 1
        partial[t] = c
    return partial.sum()


@njit(inline="always")
def _mix(z):
    # splitmix64's finaliser (Steele, Lea and Flood, "Fast splittable pseudorandom number
    # generators", OOPSLA 2014): a counter-based hash, so every thread fills its part alone
    z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
    z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
    return z ^ (z >> np.uint64(31))


@njit(parallel=True, cache=True)
def random_indices(index, n, seed, nthreads):
    """index[i] = a pseudo-random position in [0, n): a pattern no prefetcher can follow."""
    for t in prange(nthreads):
        lo, hi = _slice(t, nthreads, index.shape[0])
        for i in range(lo, hi):
            index[i] = np.int64(_mix(np.uint64(i) + np.uint64(seed) * np.uint64(0x9E3779B97F4A7C15))
                                % np.uint64(n))


@njit(parallel=True, cache=True)
def pattern_sum_at(index, modulus, nthreads):
    """Sum of (index[i] % modulus): what gathering from fill_pattern data must return, computed
    from the indices alone (not through the loads being verified)."""
    partial = np.zeros(nthreads)
    for t in prange(nthreads):
        lo, hi = _slice(t, nthreads, index.shape[0])
        s = 0.0
        for i in range(lo, hi):
            s += index[i] % modulus
        partial[t] = s
    return partial.sum()
