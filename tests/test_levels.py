"""Cache levels found in a bandwidth curve."""

import math

import pytest

from eaves.levels import CacheCapacity, detect_plateaus, level_of, representative

SIZES = [4096 * 2**i for i in range(20)]
REPORTED = [CacheCapacity("L1", 48 * 1024), CacheCapacity("L2", 2 * 2**20), CacheCapacity("L3", 32 * 2**20)]


def staircase(noise=0.03):
    def bw(s):
        return 170e9 if s <= 32 * 1024 else 90e9 if s <= 2 * 2**20 else 50e9 if s <= 16 * 2**20 else 18e9
    return [bw(s) * (1 + noise * math.sin(3 * i)) for i, s in enumerate(SIZES)]


def test_a_staircase_gives_one_plateau_per_level_named_after_the_os_sizes():
    plateaus = detect_plateaus(SIZES, staircase(), REPORTED, dram_after=64 * 2**20)
    assert [p.name for p in plateaus] == ["L1", "L2", "L3", "DRAM"]
    # a step between two sizes is crossed half-way between them (in log size, log bandwidth)
    assert plateaus[0].edge_bytes == pytest.approx(2**15.5, rel=0.05)
    assert plateaus[1].edge_bytes == pytest.approx(2**21.5, rel=0.05)
    assert plateaus[-1].edge_bytes is None
    assert plateaus[0].bytes_per_s == pytest.approx(170e9, rel=0.05)
    assert level_of(8192, plateaus, SIZES) == "L1"
    assert level_of(SIZES[-1], plateaus, SIZES) == "DRAM"
    for p in plateaus:
        assert p.first <= representative(p) <= p.last


def test_a_flat_curve_is_one_level():
    plateaus = detect_plateaus(SIZES, [20e9] * len(SIZES), REPORTED, dram_after=64 * 2**20)
    assert len(plateaus) == 1 and plateaus[0].name == "DRAM"


def test_without_os_sizes_levels_are_numbered():
    plateaus = detect_plateaus(SIZES, staircase(), (), dram_after=None)
    assert [p.name for p in plateaus] == ["L1", "L2", "L3", "DRAM"]


def test_a_last_level_reported_larger_than_one_core_holds_is_still_named():
    # a virtual machine reports the whole socket's L3 (here 4.7x what the curve shows); a short
    # transition between L2 and L3 stays unnamed
    def bw(s):
        if s <= 32 * 1024:
            return 280e9
        if s <= 1 * 2**20:
            return 150e9
        if s <= 2 * 2**20:
            return 100e9
        return 40e9 if s <= 64 * 2**20 else 15e9
    reported = [CacheCapacity("L1", 48 * 1024), CacheCapacity("L2", 2 * 2**20), CacheCapacity("L3", 480 * 2**20)]
    names = [p.name for p in detect_plateaus(SIZES, [bw(s) for s in SIZES], reported, dram_after=960 * 2**20)]
    assert names[:2] == ["L1", "L2"] and "L3" in names and names[-1] == "DRAM"
