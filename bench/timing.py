"""How one figure is sampled: calibrated repetitions, several samples, robust statistics.

A call under test takes a repetition count and does that many units of work inside one
call (so thread start-up and Python overhead are paid once per sample, not once per unit).
Compilation and first touch of every page are the caller's job and happen before `sample`.
"""

from __future__ import annotations

import statistics
import time
from dataclasses import dataclass, field
from typing import Any, Callable, Sequence

clock_ns = time.perf_counter_ns  # monotonic, nanosecond resolution


def quartiles(values: Sequence[float]) -> tuple[float, float]:
    """First and third quartiles (inclusive method); both the value itself for one sample."""
    s = sorted(values)
    if len(s) < 2:
        return s[0], s[0]
    q = statistics.quantiles(s, n=4, method="inclusive")
    return q[0], q[2]


def coefficient_of_variation(values: Sequence[float]) -> float:
    """Standard deviation over mean; 0 for fewer than two samples."""
    if len(values) < 2:
        return 0.0
    mean = statistics.fmean(values)
    return statistics.stdev(values) / mean if mean else 0.0


@dataclass(frozen=True)
class TimingPolicy:
    """How long one sample must last and how many to take."""

    min_seconds: float = 0.02
    samples: int = 5
    max_repetitions: int = 1 << 30

    @classmethod
    def quick(cls) -> "TimingPolicy":
        return cls(min_seconds=0.005, samples=5)

    @classmethod
    def full(cls) -> "TimingPolicy":
        return cls(min_seconds=0.01, samples=9)

    @classmethod
    def tiny(cls) -> "TimingPolicy":
        """For tests: short samples, still enough of them for a median and a spread."""
        return cls(min_seconds=0.002, samples=3)


@dataclass(frozen=True)
class Timing:
    """Seconds per repetition of each sample, with what it takes to reproduce them."""

    seconds: tuple[float, ...]
    repetitions: int
    min_seconds: float
    results: tuple[Any, ...] = field(default=(), compare=False, repr=False)

    @property
    def best(self) -> float:
        return min(self.seconds)

    @property
    def median(self) -> float:
        return statistics.median(self.seconds)

    @property
    def quartiles(self) -> tuple[float, float]:
        return quartiles(self.seconds)

    @property
    def iqr(self) -> float:
        q1, q3 = self.quartiles
        return q3 - q1

    @property
    def cv(self) -> float:
        """Coefficient of variation (standard deviation over mean) of the samples."""
        return coefficient_of_variation(self.seconds)

    def rates(self, work_per_repetition: float) -> tuple[float, ...]:
        """Work per second for every sample (bytes/s, FLOP/s ... whatever `work` counts)."""
        return tuple(work_per_repetition / s for s in self.seconds)


def _elapsed(call: Callable[[int], Any], repetitions: int) -> tuple[float, Any]:
    start = clock_ns()
    result = call(repetitions)
    return (clock_ns() - start) * 1e-9, result


def calibrate(call: Callable[[int], Any], policy: TimingPolicy, start: int = 1) -> int:
    """Smallest repetition count (roughly) whose call lasts at least `policy.min_seconds`.

    A call stalled by another process (a parallel region waiting for a descheduled thread)
    looks long whatever its repetitions, so a count is accepted only once the time grows
    with it: half the repetitions must take at most three quarters of the time. `start` is a
    guess (the count that suited a neighbouring size) that saves steps when it is good.
    """
    reps = max(1, start)
    spent = 0.0
    while True:
        seconds = _elapsed(call, reps)[0]
        spent += seconds
        if reps >= policy.max_repetitions or spent > max(0.25, 25 * policy.min_seconds):
            return reps
        if seconds > 3 * policy.min_seconds and reps > 1:
            # the guess overshot (a neighbouring size ran from a faster cache): scale down, once
            reps = max(1, int(reps * 1.2 * policy.min_seconds / seconds))
            continue
        if seconds >= policy.min_seconds:
            if seconds > 5 * policy.min_seconds:
                return reps  # longer than any scheduling stall several times over: the work dominates
            other = 2 * reps if reps == 1 else reps // 2
            check = _elapsed(call, other)[0]
            spent += check
            if (other > reps and check >= seconds * 4 / 3) or (other < reps and check <= seconds * 3 / 4):
                return reps
            reps = min(policy.max_repetitions, reps * 2)
            continue
        # aim 20% past the target; grow at most 100x per step so a noisy first call can't overshoot
        scale = policy.min_seconds * 1.2 / max(seconds, 1e-9)
        reps = min(policy.max_repetitions, max(reps + 1, int(reps * min(scale, 100.0))))


def sample(call: Callable[[int], Any], policy: TimingPolicy, repetitions: int | None = None,
           start: int = 1, warm: bool = True) -> Timing:
    """Time `call(repetitions)` `policy.samples` times; seconds are per repetition.

    One untimed call warms up first (JIT compilation or cache loading, page faults, caches),
    then the count is calibrated unless `repetitions` is given; `warm=False` skips the warm-up
    for a call already compiled and on touched pages (the calibration's calls still fill the
    caches). The result of every timed call is kept so the caller can verify its checksum.
    """
    if warm:
        call(1)
    reps = repetitions or calibrate(call, policy, start)
    seconds, results = [], []
    for _ in range(policy.samples):
        elapsed, result = _elapsed(call, reps)
        seconds.append(elapsed / reps)
        results.append(result)
    return Timing(tuple(seconds), reps, policy.min_seconds, tuple(results))


def repeat_callable(fn: Callable[[], Any]) -> Callable[[int], Any]:
    """Adapt a plain callable (a numpy layer, a BLAS call) to the repetition interface."""

    def call(reps: int) -> Any:
        result = None
        for _ in range(reps):
            result = fn()
        return result

    return call
