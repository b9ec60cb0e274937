"""The memory plan's sizes: DRAM figures at a working set no cache of a socket can hold, in quick mode too."""

import json
import math
from pathlib import Path

import pytest

from eaves.budget import MemoryBudget
from eaves.errors import InputError
from eaves.host import HostFacts
from eaves.memory_survey import MIN_SWEEP_BYTES, dram_working_set, plan_memory

MiB, GiB = 2**20, 2**30
ZEN4 = Path(__file__).parent / "fixtures" / "zen4-kvm-2cpu" / "quick-memory.json"
ROOMY = MemoryBudget(cap_bytes=64 * GiB, available_bytes=64 * GiB)


def zen4_host() -> HostFacts:
    return HostFacts.from_dict(json.loads(ZEN4.read_text())["host"])


@pytest.mark.parametrize("quick", [True, False])
def test_the_sweep_reaches_8x_the_socket_caches_and_256_mib_in_both_modes(quick):
    host = zen4_host()
    socket = host.socket_cache_bytes()  # 2 x 32 KiB + 2 x 1 MiB + 32 MiB (the fixture's sysfs report)
    llc = host.last_level_cache().size_bytes
    plan = plan_memory(llc, [1, 2], ROOMY, quick, socket_cache_bytes=socket)
    # issue 10 C: at least 8x every cache of one socket, and at least 256 MiB
    assert plan.dram_bytes_wanted >= 8 * socket and plan.dram_bytes_wanted >= 256 * MiB
    assert plan.dram_bytes_wanted < 2 * max(8 * socket, 256 * MiB)  # the next power of two, no more
    assert plan.dram_bytes_wanted & (plan.dram_bytes_wanted - 1) == 0
    assert plan.sizes[-1] == plan.top_bytes == plan.dram_bytes_wanted  # the sweep stops at the DRAM size
    assert not plan.cache_assisted and plan.dram_caution() is None
    per_octave = 1 if quick else 2
    assert len(plan.sizes) == round(math.log2(plan.top_bytes / MIN_SWEEP_BYTES)) * per_octave + 1
    assert plan.buffer_bytes * 3 // 2 <= ROOMY.cap_bytes


def test_small_caches_still_get_256_mib_and_the_last_level_stands_in_for_unknown_ones():
    assert dram_working_set(4 * MiB) == 256 * MiB
    assert dram_working_set(None) == 256 * MiB
    assert dram_working_set(33 * MiB) == 512 * MiB  # 8 x 33 = 264 MiB, rounded up
    plan = plan_memory(64 * MiB, [1], ROOMY, quick=True)  # no socket sum: 8x the last-level cache
    assert plan.dram_bytes_wanted == 512 * MiB


def test_a_cap_below_the_dram_size_gives_cache_assisted_figures_and_says_what_they_need():
    host = zen4_host()
    cap = MemoryBudget(cap_bytes=400 * MiB, available_bytes=64 * GiB)
    plan = plan_memory(host.last_level_cache().size_bytes, [1, 2], cap, True,
                       socket_cache_bytes=host.socket_cache_bytes())
    assert plan.top_bytes < plan.dram_bytes_wanted and plan.cache_assisted
    assert 3 * plan.top_bytes // 2 <= cap.cap_bytes < 3 * 2 * plan.top_bytes // 2  # the largest that fits
    assert plan.honest_memory_bytes == 3 * plan.dram_bytes_wanted // 2 > cap.cap_bytes
    caution = plan.dram_caution()
    assert "possibly cache-assisted" in caution and "768 MiB" in caution and "--max-memory 768MiB" in caution


def test_sweep_top_overrides_the_dram_size_both_ways():
    small = plan_memory(None, [1], ROOMY, True, top_bytes=64 * MiB, socket_cache_bytes=34 * MiB)
    assert small.top_bytes == 64 * MiB and small.cache_assisted  # asked below the DRAM size: said so
    large = plan_memory(None, [1], ROOMY, True, top_bytes=2 * GiB, socket_cache_bytes=34 * MiB)
    assert large.top_bytes == 2 * GiB and not large.cache_assisted
    with pytest.raises(InputError):
        plan_memory(None, [1], MemoryBudget(cap_bytes=64 * 1024, available_bytes=GiB), True)


def test_a_level_is_measured_at_the_same_size_when_its_plateau_is_cut_short():
    # the OS's sizes fix the working set (the middle of L1's range, 8-32 KiB: 16 KiB); a plateau that
    # noise ends at 8 KiB in one run must not move it, one far from the OS's range does
    from eaves.levels import Plateau
    from eaves.memory_survey import level_size

    grid = [4096 * 2**i for i in range(8)]
    full = Plateau("L1", 0, 3, tuple(grid[0:4]), 1e11, 30_000, 32768)
    short = Plateau("L1", 0, 1, tuple(grid[0:2]), 1e11, 9_000, 32768)
    far = Plateau("L1", 5, 7, tuple(grid[5:8]), 1e11, None, 32768)
    assert level_size(full, 16384, grid)[0] == level_size(short, 16384, grid)[0] == 16384
    assert level_size(far, 16384, grid)[0] == grid[5]
