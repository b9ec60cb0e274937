"""Cache levels found in a bandwidth curve: synthetic hierarchies, and the curves of a Zen 4 guest."""

import json
import math
from pathlib import Path

import pytest

from eaves.host import HostFacts
from eaves.levels import (FLAT_TOLERANCE, TRANSITION, CacheCapacity, detect_plateaus, dram_flatness,
                          latency_sizes, level_of, not_seen, representative, usable_capacities)

SIZES = [4096 * 2**i for i in range(20)]
REPORTED = [CacheCapacity("L1", 48 * 1024), CacheCapacity("L2", 2 * 2**20), CacheCapacity("L3", 32 * 2**20)]
ZEN4 = Path(__file__).parent / "fixtures" / "zen4-kvm-2cpu"
KiB, MiB = 1024, 2**20


def staircase(noise=0.03):
    def bw(s):
        return 170e9 if s <= 32 * 1024 else 90e9 if s <= 2 * 2**20 else 50e9 if s <= 16 * 2**20 else 18e9
    return [bw(s) * (1 + noise * math.sin(3 * i)) for i, s in enumerate(SIZES)]


def steps(sizes, levels, noise=0.03):
    """A curve of (up-to-bytes, bandwidth) steps; past the last, the final bandwidth."""
    def bw(s):
        return next((b for top, b in levels if s <= top), levels[-1][1])
    return [bw(s) * (1 + noise * math.sin(3 * i)) for i, s in enumerate(sizes)]


def named(plateaus):
    return [p.name for p in plateaus if p.name != TRANSITION]


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
    assert representative(plateaus[-1]) == len(SIZES) - 1  # DRAM at the sweep's top, the DRAM working set
    assert not_seen(plateaus, REPORTED) == []


def test_a_flat_curve_is_one_level():
    plateaus = detect_plateaus(SIZES, [20e9] * len(SIZES), REPORTED, dram_after=64 * 2**20)
    assert len(plateaus) == 1 and plateaus[0].name == "DRAM"
    assert not_seen(plateaus, REPORTED) == REPORTED


def test_without_os_sizes_plateaus_are_transitions_never_numbered_levels():
    plateaus = detect_plateaus(SIZES, staircase(), (), dram_after=None)
    assert [p.name for p in plateaus] == [TRANSITION] * 3 + ["DRAM"]
    # the breaks are still where the curve steps
    assert [p.sizes[-1] for p in plateaus[:-1]] == [32 * KiB, 2 * MiB, 16 * MiB]


def test_a_last_level_reported_larger_than_one_core_holds_is_still_named():
    # a virtual machine reports the whole socket's L3 (here 7.5x what the curve shows); a short
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
    plateaus = detect_plateaus(SIZES, [bw(s) for s in SIZES], reported, dram_after=960 * 2**20)
    assert named(plateaus) == ["L1", "L2", "L3", "DRAM"]
    l3 = next(p for p in plateaus if p.name == "L3")
    assert 32 * MiB <= l3.edge_bytes <= 128 * MiB  # where the curve falls, not where the OS says


def test_a_victim_l3_smaller_than_the_l2s_is_found_past_their_sum():
    # exclusive hierarchy (from memory: AMD's L3 and Intel's server L3 since Skylake-SP are victim caches,
    # holding lines the L2s evicted): at two threads two private 1 MiB L2s (2 MiB) and a shared 1.5 MiB L3 hold 3.5 MiB of
    # distinct data. The L3 is smaller than the L2s together, and its break lies past their sum.
    sizes = [int(4096 * 2 ** (k / 2)) // 128 * 128 for k in range(33)]  # 4 KiB .. 256 MiB, two per octave
    l1, l2, l3 = 64 * KiB, 2 * MiB, 3 * MiB // 2
    curve = steps(sizes, [(l1, 300e9), (l2, 180e9), (l1 + l2 + l3, 100e9), (2**40, 25e9)])
    reported = [CacheCapacity("L1", l1), CacheCapacity("L2", l2), CacheCapacity("L3", l3)]
    plateaus = detect_plateaus(sizes, curve, reported, dram_after=16 * MiB)
    assert named(plateaus) == ["L1", "L2", "L3", "DRAM"]
    edges = {p.name: p.edge_bytes for p in plateaus}
    assert l1 / 2 <= edges["L1"] <= 2 * l1 and l2 / 2 <= edges["L2"] <= 2 * l2
    assert l2 < edges["L3"] <= 2 * (l1 + l2 + l3)
    # its latency working set lies inside it: past the L2s, within the L2s plus itself (one thread: the
    # shares of one core, 1 MiB of L2 and the whole L3)
    one = [CacheCapacity("L1", l1 // 2), CacheCapacity("L2", l2 // 2), CacheCapacity("L3", l3)]
    chase = latency_sizes(one, 256 * MiB)
    assert l2 // 2 < chase["L3"] < l2 // 2 + l3


def test_a_level_the_curve_does_not_show_is_not_seen_not_merged():
    # L2 and L3 read at the same rate: the OS reports an L2 the bandwidth curve cannot show
    curve = steps(SIZES, [(32 * KiB, 200e9), (32 * MiB, 90e9), (2**40, 20e9)])
    reported = [CacheCapacity("L1", 32 * KiB), CacheCapacity("L2", 1 * MiB), CacheCapacity("L3", 32 * MiB)]
    plateaus = detect_plateaus(SIZES, curve, reported, dram_after=64 * MiB)
    assert named(plateaus) == ["L1", "L3", "DRAM"]
    assert not_seen(plateaus, reported) == [reported[1]]
    l3 = next(p for p in plateaus if p.name == "L3")
    assert l3.reported_bytes == 32 * MiB and 16 * MiB <= l3.edge_bytes <= 64 * MiB


def test_a_sweep_ending_inside_the_last_level_says_only_how_far_it_reaches():
    sizes = SIZES[:13]  # 4 KiB .. 16 MiB: inside the 32 MiB L3
    plateaus = detect_plateaus(sizes, staircase()[:13], REPORTED, dram_after=64 * MiB)
    assert named(plateaus) == ["L1", "L2", "L3"]
    assert plateaus[-1].edge_bytes == sizes[-1]  # the L3 holds at least this; its end is not measured


# ---------------------------------------------------------------- the Zen 4 guest of tests/fixtures/zen4-kvm-2cpu


def zen4_curve(name: str, threads: int, stat: str):
    """The sweep's read curve at `threads` threads and the OS levels scaled to them, as the survey has them."""
    doc = json.loads((ZEN4 / name).read_text())
    host = HostFacts.from_dict(doc["host"])
    points = sorted((f["working_set_bytes"], f[f"{stat}_bytes_per_s"]) for f in doc["figures"]
                    if f["suite"] == "sweep" and f["kernel"] == "read" and f["threads"] == threads)
    data = [c for c in host.caches if c.kind != "instruction"]
    reported = [CacheCapacity(f"L{c.level}", c.size_bytes) for c in data]
    shares = {f"L{c.level}": (c.size_bytes, c.shared_cpus, c.instances) for c in data}
    return [s for s, _ in points], [b for _, b in points], reported, usable_capacities(reported, shares, threads)


@pytest.mark.parametrize("stat", ["best", "median"])
@pytest.mark.parametrize("threads", [1, 2])
@pytest.mark.parametrize("name", ["quick-memory.json", "full-memory.json"])
def test_zen4_guest_levels_are_the_os_levels_within_a_factor_of_two(name, threads, stat):
    sizes, curve, reported, capacities = zen4_curve(name, threads, stat)
    # what sysfs reported on that guest (the fixture's README): L1d 32 KiB and L2 1 MiB per core, L3 32 MiB
    # shared by both vCPUs; at two threads both private L1s and L2s are in use
    assert [(c.name, c.bytes) for c in reported] == [("L1", 32 * KiB), ("L2", 1 * MiB), ("L3", 32 * MiB)]
    assert [c.bytes for c in capacities] == [32 * KiB * threads, 1 * MiB * threads, 32 * MiB]
    plateaus = detect_plateaus(sizes, curve, capacities, dram_after=2 * max(c.bytes for c in capacities))
    assert named(plateaus) == ["L1", "L2", "L3", "DRAM"]  # no level the OS does not report (the old L5 to L7)
    assert not_seen(plateaus, capacities) == []
    for p, c in zip((p for p in plateaus if p.name.startswith("L") and p.name != TRANSITION), capacities):
        assert c.bytes / 2 <= p.edge_bytes <= 2 * c.bytes, (p.name, p.edge_bytes, c.bytes)
    assert [p.first for p in plateaus] == sorted(p.first for p in plateaus)
    assert plateaus[0].first == 0 and plateaus[-1].last == len(sizes) - 1
    assert all(a.last + 1 == b.first for a, b in zip(plateaus, plateaus[1:]))  # they tile the curve


@pytest.mark.parametrize("threads", [1, 2])
def test_zen4_quick_sweep_stops_before_dram_and_the_flatness_check_says_so(threads):
    sizes, curve, _, _ = zen4_curve("quick-memory.json", threads, "best")
    flat = dram_flatness(sizes, curve)
    assert not flat.flat and flat.spread > FLAT_TOLERANCE and "cache-assisted" in flat.note()
    # the fixture's README: a compiled C loop over 2 x 256 MiB read 17.8 (1 thread) and 26.4 GB/s (2 threads)
    # in the same minutes: the 64 MiB point is far above DRAM, as the check says
    assert curve[-1] > 1.15 * {1: 17.8e9, 2: 26.4e9}[threads]


def test_zen4_full_sweep_reaches_a_flat_dram_plateau_at_one_thread():
    sizes, curve, _, _ = zen4_curve("full-memory.json", 1, "best")
    flat = dram_flatness(sizes, curve)
    assert flat.flat and flat.note() is None
    assert flat.sizes == (sizes[-2], sizes[-1])


def test_flatness_both_ways_and_its_tolerance():
    assert dram_flatness([1, 2], [20e9, 19.5e9]).flat  # 2.6% apart
    falling = dram_flatness([128 * MiB, 256 * MiB], [30e9, 20e9])
    assert not falling.flat and falling.spread == pytest.approx(0.5) and "still falling" in falling.note()
    rising = dram_flatness([128 * MiB, 256 * MiB], [20e9, 22e9])
    assert not rising.flat and "busy" in rising.note()
    edge = dram_flatness([1, 2], [1.0 + FLAT_TOLERANCE, 1.0])
    assert edge.flat and not dram_flatness([1, 2], [1.0 + 2 * FLAT_TOLERANCE, 1.0]).flat


@pytest.mark.parametrize("name", ["quick-memory.json", "full-memory.json"])
def test_latency_sizes_lie_strictly_inside_each_level(name):
    sizes, curve, reported, _ = zen4_curve(name, 1, "best")  # the chase runs on one thread
    plateaus = detect_plateaus(sizes, curve, reported, dram_after=2 * reported[-1].bytes)
    chase = latency_sizes(reported, 512 * MiB, plateaus)
    assert list(chase) == ["L1", "L2", "L3", "DRAM"]
    inner = 0
    for c in reported:
        assert inner < chase[c.name] < c.bytes, (c.name, chase[c.name])
        edge = next(p.edge_bytes for p in plateaus if p.name == c.name)
        assert edge <= inner or chase[c.name] < edge  # inside what the curve shows too
        assert chase[c.name] % 64 == 0  # whole cache lines
        inner = c.bytes
    assert chase["DRAM"] == 512 * MiB


def test_latency_size_below_a_vm_reported_l3_follows_the_curve():
    # the OS reports 480 MiB but the curve falls at 64 MiB: the chase must stay below where it falls
    reported = [CacheCapacity("L1", 48 * KiB), CacheCapacity("L2", 2 * MiB), CacheCapacity("L3", 480 * MiB)]
    curve = steps(SIZES, [(32 * KiB, 280e9), (2 * MiB, 150e9), (64 * MiB, 40e9), (2**40, 15e9)])
    plateaus = detect_plateaus(SIZES, curve, reported, dram_after=960 * MiB)
    l3 = next(p for p in plateaus if p.name == "L3")
    assert 2 * MiB < latency_sizes(reported, 2**31, plateaus)["L3"] < l3.edge_bytes < 480 * MiB


def test_usable_capacities_scale_private_caches_by_the_threads_using_them():
    # Linux sysfs cacheinfo semantics: shared_cpu_list names the CPUs of one instance
    reported = [CacheCapacity("L2", 1 * MiB), CacheCapacity("L3", 32 * MiB)]
    shares = {"L2": (1 * MiB, 1, 2), "L3": (32 * MiB, 2, 1)}
    assert [c.bytes for c in usable_capacities(reported, shares, 2)] == [2 * MiB, 32 * MiB]
    assert [c.bytes for c in usable_capacities(reported, shares, 1)] == [1 * MiB, 32 * MiB]
    assert usable_capacities(reported, None, 2) == reported
