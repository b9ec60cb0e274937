"""Judge whether two sets of samples of one figure differ beyond noise (Mann-Whitney U and a threshold).

A change counts only when both hold: the two-sided Mann-Whitney U test (Mann and Whitney, "On a
test of whether one of two random variables is stochastically larger than the other", Annals of
Mathematical Statistics 18, 1947) rejects "same distribution" at `alpha`, and the medians differ
by at least `threshold` (a fraction; the practical threshold) and by at least the run-to-run floor
when a `RunNoise` is given (eaves.noise: a figure moves further between runs than between the
samples of one run). The test uses only ranks, so one
preempted sample cannot drag it the way it drags a mean; with few samples and no ties its p-value
is exact. See docs/comparing.md for the choice and its false-alarm and power figures.
"""

from __future__ import annotations

import math
import statistics
from dataclasses import dataclass
from functools import lru_cache
from typing import Optional, Sequence

import numpy as np

from eaves.errors import InputError
from eaves.noise import RunNoise

DEFAULT_THRESHOLD = 0.03  # 3 %: below this a change is not worth acting on, whatever the test says
DEFAULT_ALPHA = 0.05
EXACT_MAX_SMALLER = 8  # exact null distribution when the smaller sample has at most this many
# The three verdicts on a figure measured twice: it moved the good way (a higher rate or efficiency, a
# shorter time or latency), the bad way, or by nothing that counts. The same words in every table,
# message and JSON document (diff, trend, gate, survey --check, report).
GAINED, LOST, HELD = "gained", "lost", "held"
VERDICTS = (GAINED, LOST, HELD)


@dataclass(frozen=True)
class RankTest:
    """The outcome of a two-sided Mann-Whitney U test of `a` against `b`."""

    u_a: float  # U of the first sample (pairs where a wins, ties counted half)
    u_b: float
    p_value: float
    method: str  # "exact" | "normal" (with tie and continuity correction)


@dataclass(frozen=True)
class Comparison:
    """One figure before and after: medians, relative change, the test, and the verdict."""

    before: float  # median of the samples, in the figure's unit
    after: float
    change: float  # (after - before) / before, a fraction
    p_value: Optional[float]  # None when there were too few samples to test
    method: str  # "exact" | "normal" | "ranges" (too few samples: ranges must not overlap)
    verdict: str  # gained | lost | held (VERDICTS)
    lower_is_better: bool
    n_before: int
    n_after: int
    noise: Optional[RunNoise] = None  # the run-to-run noise the change was held against (None: samples only)

    @property
    def floor(self) -> float:
        """The run-to-run floor the change had to pass besides the threshold (0 without run noise)."""
        return self.noise.floor if self.noise else 0.0

    @property
    def change_pct(self) -> float:
        return 100.0 * self.change

    @property
    def worse(self) -> bool:
        return self.verdict == LOST


def _ranks(values: Sequence[float]) -> tuple[list[float], list[int]]:
    """Mid-ranks (ties share the mean rank) and the size of every tie group."""
    order = sorted(range(len(values)), key=lambda i: values[i])
    ranks = [0.0] * len(values)
    ties, i = [], 0
    while i < len(order):
        j = i
        while j + 1 < len(order) and values[order[j + 1]] == values[order[i]]:
            j += 1
        for k in range(i, j + 1):
            ranks[order[k]] = 0.5 * (i + j) + 1.0
        ties.append(j - i + 1)
        i = j + 1
    return ranks, ties


@lru_cache(maxsize=256)
def _u_counts(m: int, n: int) -> tuple[float, ...]:
    """How many orderings give each U = 0 .. m n: the coefficients of the Gaussian binomial
    [m+n choose m]_q = prod_{i=1..m} (1 - q^(n+i)) / (1 - q^i) (Mann and Whitney 1947)."""
    size = m * n + 1
    c = np.zeros(size)
    c[0] = 1.0
    for i in range(1, m + 1):
        shift = n + i
        if shift < size:
            c[shift:] -= c[:size - shift].copy()
        pad = (-size) % i  # divide by (1 - q^i): running sums over every i-th coefficient
        c = np.concatenate([c, np.zeros(pad)]).reshape(-1, i).cumsum(axis=0).reshape(-1)[:size]
    return tuple(float(x) for x in c)


def _normal_sf(z: float) -> float:
    return 0.5 * math.erfc(z / math.sqrt(2.0))


def mann_whitney(a: Sequence[float], b: Sequence[float], method: str = "auto") -> RankTest:
    """Two-sided Mann-Whitney U test; `method` auto picks exact when the smaller sample has at most
    8 values and there are no ties, else the normal approximation with tie correction."""
    n1, n2 = len(a), len(b)
    if n1 == 0 or n2 == 0:
        raise InputError("mann_whitney: both samples need at least one value")
    ranks, ties = _ranks(list(a) + list(b))
    u_a = sum(ranks[:n1]) - n1 * (n1 + 1) / 2.0
    u_b = n1 * n2 - u_a
    big = max(u_a, u_b)
    if method == "auto":
        method = "exact" if min(n1, n2) <= EXACT_MAX_SMALLER and max(ties) == 1 else "normal"
    if method == "exact":
        counts = _u_counts(min(n1, n2), max(n1, n2))
        p = 2.0 * sum(counts[int(math.ceil(big)):]) / sum(counts)
    elif method == "normal":
        n = n1 + n2
        tie_term = sum(t ** 3 - t for t in ties) / (n * (n - 1)) if n > 1 else 0.0
        var = n1 * n2 / 12.0 * ((n + 1) - tie_term)
        if var <= 0:  # every value equal
            return RankTest(u_a, u_b, 1.0, method)
        z = (big - n1 * n2 / 2.0 - 0.5) / math.sqrt(var)
        p = 2.0 * _normal_sf(z)
    else:
        raise InputError(f"mann_whitney: unknown method {method!r} (auto, exact, normal)")
    return RankTest(u_a, u_b, min(1.0, p), method)


def smallest_p(n1: int, n2: int) -> float:
    """The smallest two-sided p-value the exact test can give: complete separation of the samples."""
    return min(1.0, 2.0 / math.comb(n1 + n2, n1))


def compare(before: Sequence[float], after: Sequence[float], lower_is_better: bool = False,
            threshold: float = DEFAULT_THRESHOLD, alpha: float = DEFAULT_ALPHA,
            reference: Optional[float] = None, noise: Optional[RunNoise] = None) -> Comparison:
    """Verdict on one figure: GAINED for a higher rate, or a lower time or latency; LOST the other way;
    HELD when the change does not count.

    When so few samples are given that even complete separation cannot reach `alpha` (for example
    one sample each), the test cannot speak; the change then counts if it passes the threshold and
    the ranges of the two sets do not overlap (method "ranges"). `reference` replaces the median of
    `before` as the value the change is measured from (a rolling baseline: the median of run medians).
    `noise`: the figure's run-to-run noise; the change must also reach its floor.
    """
    before, after = [float(x) for x in before], [float(x) for x in after]
    if not before or not after:
        raise InputError("compare: both sides need at least one sample")
    if threshold < 0 or not 0 < alpha < 1:
        raise InputError(f"compare: threshold {threshold} must be >= 0 and alpha {alpha} in (0, 1)")
    m_before = statistics.median(before) if reference is None else float(reference)
    m_after = statistics.median(after)
    change = (m_after - m_before) / m_before if m_before else (0.0 if m_after == m_before else math.inf)
    if smallest_p(len(before), len(after)) >= alpha:
        p_value, method = None, "ranges"
        apart = max(before) < min(after) or max(after) < min(before)
    else:
        test = mann_whitney(before, after)
        p_value, method, apart = test.p_value, test.method, test.p_value < alpha
    verdict = HELD
    if apart and abs(change) >= max(threshold, noise.floor if noise else 0.0) and change != 0:
        better = change < 0 if lower_is_better else change > 0
        verdict = GAINED if better else LOST
    return Comparison(m_before, m_after, change, p_value, method, verdict, lower_is_better,
                      len(before), len(after), noise)
