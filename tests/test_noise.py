"""The run-to-run noise model: the spread, the floor's multiple, defaults, and how compare uses it."""

from __future__ import annotations

import math
import statistics

import numpy as np
import pytest

from eaves.compare import HELD, LOST, compare
from eaves.metrics import MetricKey
from eaves.noise import (DEFAULT_SPREAD, MIN_HISTORY_RUNS, NOISE_MULTIPLE, RunNoise, default_noise, larger, learn,
                         noise_of, spread_of)


def test_spread_is_the_median_change_between_consecutive_runs():
    # Worked by hand: 100 -> 110 (+10 %), 110 -> 99 (-10 %), 99 -> 99 (0 %): median of |changes| 10 %.
    assert spread_of([100.0, 110.0, 99.0, 99.0]) == pytest.approx(0.10)
    assert spread_of([100.0, 110.0]) is None  # two runs: too few (MIN_HISTORY_RUNS = 3)
    assert MIN_HISTORY_RUNS == 3
    # the order matters: the same values sorted move less from run to run
    assert spread_of([99.0, 99.0, 100.0, 110.0]) == pytest.approx(1 / 99)
    # one step inside the window is one change of k - 1: it barely moves the spread
    steady = [100.0, 101.0, 100.0, 101.0, 100.0, 101.0, 100.0, 101.0, 100.0, 101.0]
    stepped = steady[:5] + [0.7 * x for x in steady[5:]]
    assert spread_of(stepped) == pytest.approx(spread_of(steady), rel=0.02)


def _phi_inverse_075() -> float:
    """The normal distribution's upper quartile, by bisection on erf (no table, no scipy)."""
    lo, hi = 0.0, 2.0
    for _ in range(60):
        mid = (lo + hi) / 2
        lo, hi = (mid, hi) if 0.5 * (1 + math.erf(mid / math.sqrt(2))) < 0.75 else (lo, mid)
    return lo


def test_the_spread_of_normal_run_noise_is_0_954_sigma():
    # For run medians with normal noise sigma, a change between runs is N(0, 2 sigma^2), whose median
    # absolute value is Phi^-1(0.75) x sqrt(2) x sigma (common practice; Phi^-1(0.75) = 0.6745 from memory).
    q = _phi_inverse_075()
    assert q == pytest.approx(0.6745, abs=1e-4)
    rng = np.random.default_rng(11)
    medians = 1.0 + 0.02 * rng.standard_normal(20001)
    assert spread_of(list(medians)) == pytest.approx(q * math.sqrt(2) * 0.02, rel=0.03)
    # with the spread known, NOISE_MULTIPLE x spread would be passed by P(|Z| > multiple x q) of the unchanged
    assert math.erfc(NOISE_MULTIPLE * q / math.sqrt(2)) < 0.005


TRIALS = 40000


def _false_flags(k: int, multiple: float, sigma: float = 0.05, seed: int = 3) -> float:
    """Share of unchanged run pairs whose change passes `multiple` x the spread learned from the k runs
    before (the last of them the "before" run), under normal run-to-run noise."""
    rng = np.random.default_rng(seed)
    m = 1.0 + sigma * rng.standard_normal((TRIALS, k + 1))
    history, after = m[:, :k], m[:, k]
    spread = np.median(np.abs(np.diff(history, axis=1) / history[:, :-1]), axis=1)
    return float(np.mean(np.abs(after / history[:, -1] - 1) > multiple * spread))


@pytest.mark.parametrize("k", [MIN_HISTORY_RUNS, 5, 10])
def test_the_multiple_keeps_false_flags_at_most_five_percent(k):
    # Issue 11's target: a diff of two unchanged runs flags at most 5 % of figures. A spread learned
    # from few runs wobbles, which fattens the tail beyond the known-spread figure above; 3x is not enough.
    assert _false_flags(k, NOISE_MULTIPLE) <= 0.05
    assert _false_flags(k, 3.0) > 0.08


def test_half_a_step_less_would_miss_the_target_with_the_shortest_history():
    assert _false_flags(MIN_HISTORY_RUNS, NOISE_MULTIPLE - 0.5) > 0.05


def test_consecutive_changes_are_steadier_than_the_deviation_from_the_median_with_few_runs():
    # The choice in eaves.noise: with three runs, one deviation from their median is zero by construction.
    rng = np.random.default_rng(8)
    runs = 1.0 + 0.05 * rng.standard_normal((4000, 3))
    consecutive = np.median(np.abs(np.diff(runs, axis=1) / runs[:, :-1]), axis=1)
    med = np.median(runs, axis=1)
    deviation = np.median(np.abs(runs - med[:, None]), axis=1) / med
    assert np.mean(deviation < 0.25 * np.median(deviation)) > 2 * np.mean(consecutive < 0.25 * np.median(consecutive))


def test_defaults_and_learning():
    assert default_noise("memory", 2) == RunNoise(DEFAULT_SPREAD["memory"], "default", 2)
    assert default_noise("memory").floor == pytest.approx(NOISE_MULTIPLE * DEFAULT_SPREAD["memory"])
    assert default_noise("layers") == RunNoise(DEFAULT_SPREAD["layers"], "default", 0)
    assert default_noise("no-such-suite") == RunNoise(0.0, "none", 0)  # no default: threshold and rank test alone
    assert set(DEFAULT_SPREAD) == {"sweep", "memory", "latency", "stride", "gather", "scaling", "clock",
                                   "compute", "gemm", "layers"}
    k1 = MetricKey("memory", "read", None, "fp64", 1, "L1", None, None)
    k2 = MetricKey("latency", "chase", None, "int64", 1, "L1", None, None)
    learned = learn([{k1: 100.0, k2: 1.0}, {k1: 104.0}, {k1: 100.0, k2: 1.1}])
    assert learned[k1] == RunNoise(statistics.median([0.04, 4 / 104]), "history", 3)
    assert learned[k2] == RunNoise(DEFAULT_SPREAD["latency"], "default", 2)  # in two of the three runs
    assert noise_of([5.0, 5.0, 5.0], "compute") == RunNoise(0.0, "history", 3)
    a, b = RunNoise(0.02, "history", 5), RunNoise(0.15, "default", 1)
    assert larger(a, b) is b and larger(None, a) is a and larger(a, None) is a


def test_compare_holds_a_change_to_the_larger_of_threshold_and_floor():
    before = [100.0, 100.5, 99.5, 100.2, 99.8]
    after = [x * 0.9 for x in before]  # 10 % down, complete separation
    assert compare(before, after).verdict == LOST  # samples and 3 % only
    wobbly = RunNoise(0.03, "history", 10)  # floor 4.5 x 3 % = 13.5 %
    c = compare(before, after, noise=wobbly)
    assert c.verdict == HELD and c.noise is wobbly and c.floor == pytest.approx(NOISE_MULTIPLE * 0.03)
    assert compare(before, [x * 0.8 for x in before], noise=wobbly).verdict == LOST
    steady = RunNoise(0.001, "history", 10)  # floor below the threshold: the threshold governs
    assert compare(before, [x * 0.98 for x in before], noise=steady).verdict == HELD
    assert compare(before, [x * 0.98 for x in before], threshold=0.01, noise=steady).verdict == LOST
