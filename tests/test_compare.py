"""The noise-aware comparison: our Mann-Whitney U against scipy's, false-alarm rate and power."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from eaves.compare import GAINED, HELD, LOST, _u_counts, compare, mann_whitney, smallest_p
from eaves.errors import InputError


@pytest.mark.parametrize("seed", range(40))
def test_p_values_match_scipy(seed):
    # Reference: scipy.stats.mannwhitneyu (a general-purpose library), two-sided, same methods.
    rng = np.random.default_rng(seed)
    n1, n2 = rng.integers(2, 10, 2)
    a, b = rng.normal(10, 1, n1), rng.normal(10.7, 1, n2)
    if seed % 3 == 0:  # ties: only the normal approximation with tie correction applies
        a, b = np.round(a), np.round(b)
    methods = ("normal",) if seed % 3 == 0 else ("exact", "normal")
    for ours in methods:
        theirs = stats.mannwhitneyu(a, b, alternative="two-sided",
                                    method="exact" if ours == "exact" else "asymptotic")
        r = mann_whitney(a, b, ours)
        assert r.u_a == pytest.approx(theirs.statistic)
        assert r.p_value == pytest.approx(theirs.pvalue, rel=1e-9, abs=1e-12)


def test_exact_null_distribution_counts_every_ordering():
    # Published fact (Mann and Whitney 1947): U takes values 0..mn, symmetric about mn/2, and the
    # counts over all C(m+n, m) orderings sum to that binomial coefficient.
    for m, n in ((1, 1), (3, 4), (5, 5), (5, 25), (8, 9)):
        c = _u_counts(m, n)
        assert len(c) == m * n + 1 and sum(c) == pytest.approx(math.comb(m + n, m))
        assert c == tuple(reversed(c))
    assert _u_counts(2, 2) == (1.0, 1.0, 2.0, 1.0, 1.0)  # worked by hand: the 6 orderings of aabb


def test_complete_separation_of_five_and_five():
    # Exact two-sided p of complete separation is 2 / C(10, 5) = 2/252 (Mann and Whitney 1947).
    r = mann_whitney([1, 2, 3, 4, 5], [6, 7, 8, 9, 10])
    assert r.method == "exact" and r.p_value == pytest.approx(2 / 252) == pytest.approx(smallest_p(5, 5))


# False-alarm rate and power. Sample sizes: 5 (eaves survey --quick) and 9 (a full survey).
# Spread: normal noise with a coefficient of variation of 3 % (5 samples) and 4 % (9 samples),
# the noisy end of what bandwidth figures show on a quiet host (common practice, not measured here).
# Rule: two-sided Mann-Whitney at alpha 0.05 AND the medians at least 3 % apart.
TRIALS = 100


@pytest.mark.parametrize("n, cv", [(5, 0.03), (9, 0.04)])
def test_false_alarm_rate_same_distribution(n, cv):
    rng = np.random.default_rng(1947)
    quiet = sum(compare(rng.normal(1.0, cv, n), rng.normal(1.0, cv, n)).verdict == HELD for _ in range(TRIALS))
    assert quiet >= 95, f"{TRIALS - quiet} false alarms in {TRIALS}"


@pytest.mark.parametrize("n, cv", [(5, 0.03), (9, 0.04)])
def test_power_against_a_ten_percent_shift(n, cv):
    rng = np.random.default_rng(2024)
    caught = sum(compare(rng.normal(1.0, cv, n), rng.normal(0.9, cv, n)).verdict == LOST for _ in range(TRIALS))
    assert caught >= 95, f"only {caught} of {TRIALS} shifts detected"


def test_direction_follows_the_unit():
    before, after = [80.0, 81, 79.5, 80.2, 80.6], [90.0, 91, 89.5, 90.4, 90.8]
    assert compare(before, after).verdict == GAINED  # a rate went up
    c = compare(before, after, lower_is_better=True)  # a latency went up
    assert c.verdict == LOST and c.change == pytest.approx(90.4 / 80.2 - 1)


def test_threshold_keeps_tiny_but_certain_changes_quiet():
    before = [100.0 + i * 0.01 for i in range(9)]
    after = [101.0 + i * 0.01 for i in range(9)]  # 1 % apart, complete separation
    assert mann_whitney(before, after).p_value < 0.001
    assert compare(before, after, threshold=0.03).verdict == HELD
    assert compare(before, after, threshold=0.005).verdict == GAINED


def test_too_few_samples_fall_back_to_ranges():
    c = compare([100.0], [80.0])
    assert c.method == "ranges" and c.p_value is None and c.verdict == LOST
    assert compare([100.0, 70.0], [80.0, 85.0]).verdict == HELD  # overlapping ranges


def test_bad_input_is_an_input_error():
    with pytest.raises(InputError):
        compare([], [1.0])
    with pytest.raises(InputError):
        compare([1.0], [1.0], threshold=-1)
