"""Memory microkernels: checksums, and relations on this machine that any real memory system obeys."""

import numpy as np
import pytest

from eaves.host import collect_host_facts
from eaves.kernels import MEMORY_KERNELS, memory as mem, thread_slices
from eaves.kernels.streaming import aligned_empty
from eaves.levels import CacheCapacity, detect_plateaus
from eaves.memory_steps import Buffers, ChaseWalk, chase, strided
from eaves.threads import use_threads, usable_cpus
from eaves.timing import TimingPolicy, sample

TINY = TimingPolicy.tiny()
HOST = collect_host_facts()
LLC = HOST.last_level_cache()
# A working set well past the last-level cache, capped so the test stays small (see DEVELOPERS.md)
DRAM_BYTES = min(4 * (LLC.size_bytes if LLC else 32 * 2**20), 512 * 2**20)


@pytest.fixture(scope="module")
def buffers():
    n = DRAM_BYTES // 8
    return aligned_empty(n), aligned_empty(n)


@pytest.mark.parametrize("kernel", MEMORY_KERNELS, ids=lambda k: f"{k.name}-{k.variant}")
@pytest.mark.parametrize("threads", sorted({1, usable_cpus()}))
def test_every_kernel_verifies_its_checksum(kernel, threads, buffers):
    a, b = buffers
    with use_threads(threads):
        for elems in (8 * 37, 4096, 100_000 // 8 * 8):
            bound = kernel.bind(a, b, elems, threads)
            for reps in (1, 3):
                got, want = bound(reps)
                assert got == pytest.approx(want, rel=1e-12), (kernel, elems, reps)
            assert bound.final_check()


def test_a_wrong_result_is_caught_by_the_checksum(buffers):
    a, b = buffers
    bound = MEMORY_KERNELS[0].bind(a, b, 4096, 1)
    a[100] = 2.0  # one element changed behind the kernel's back: the closed form no longer holds
    got, want = bound(2)
    assert got != want


def test_slices_cover_the_array_once_on_line_boundaries():
    for n, t in ((1000, 3), (4096, 2), (64, 1), (8 * 1001, 7)):
        s = thread_slices(n, t)
        assert s[0][0] == 0 and s[-1][1] == n
        assert all(hi == lo2 for (_, hi), (lo2, _) in zip(s, s[1:]))
        assert all(lo % 8 == 0 for lo, _ in s)


def _read_rate(a, size, threads=1, policy=TINY):
    kernel = MEMORY_KERNELS[0]
    elems = size // 8
    with use_threads(threads):
        timing = sample(kernel.bind(a, a, elems, threads), policy)
    return max(timing.rates(8 * elems))


def test_l1_is_faster_than_dram(buffers):
    # common practice: every cache level is faster than the memory behind it
    a, _ = buffers
    assert _read_rate(a, 16 * 1024) > 1.5 * _read_rate(a, DRAM_BYTES)


def test_dram_latency_is_above_l1_latency(buffers):
    # common practice: a dependent load that misses every cache waits for DRAM
    held = Buffers(DRAM_BYTES, 1)
    l1 = chase(held, 16 * 1024, TINY, "L1").best
    dram = chase(held, DRAM_BYTES, TINY, "DRAM").best
    assert dram > 5 * l1


def test_the_chase_walks_on_around_its_cycle_from_call_to_call():
    # A timed call that restarted at the same slot would walk the same first lines every sample, which
    # the last-level cache then holds, and a "DRAM" latency would be the L3's. Each call must start where
    # the last one ended, so samples together visit distinct lines until the cycle comes round.
    slots = 1000
    nxt = np.zeros(slots * mem.LINE_ELEMS, dtype=np.int64)
    order = np.random.default_rng(3).permutation(slots).astype(np.int64)
    mem.build_cycle(nxt, order, mem.LINE_ELEMS)
    walk = ChaseWalk(nxt, order)
    ends = []
    for _ in range(4):
        got, want = walk(150)
        assert got == want  # the checksum: where the cycle says 150 more loads end
        ends.append(got)
    assert len(set(ends)) == 4
    assert ends == [int(order[150 * (i + 1)]) * mem.LINE_ELEMS for i in range(4)]
    assert walk(650)[0] == int(order[(600 + 650) % slots]) * mem.LINE_ELEMS  # round the cycle and on


def test_strided_useful_bandwidth_falls_as_the_stride_grows_to_a_line(buffers):
    # common practice: a cache line is moved whole, so touching fewer of its bytes wastes the rest
    size = DRAM_BYTES // 2
    rates = [strided(Buffers(DRAM_BYTES, 1), size, s, 1, TINY).best for s in (1, 2, 4, 8)]
    assert rates[0] > rates[1] > rates[2] > rates[3]
    assert rates[0] > 3 * rates[3]


def test_detected_l1_and_l2_are_within_a_factor_of_two_of_sysfs(buffers):
    # the OS's own report: /sys/devices/system/cpu/cpu0/cache/index*/size, read by eaves.host
    l1, l2 = HOST.cache(1), HOST.cache(2)
    if l1 is None or l2 is None:
        pytest.skip("sysfs reports no L1/L2 sizes on this machine")
    a, _ = buffers
    sizes = [int(4096 * 2 ** (k / 2)) // 128 * 128 for k in range(int(2 * np.log2(8 * l2.size_bytes / 4096)) + 1)]
    # the best of 9 short samples per size, over two passes of the sweep: another process on a shared host
    # only ever lowers a sample, and a pause of the VM can spoil several neighbouring sizes of one pass
    policy = TimingPolicy(min_seconds=0.002, samples=9)
    passes = [[_read_rate(a, s, policy=policy) for s in sizes] for _ in range(2)]
    rates = [max(pair) for pair in zip(*passes)]
    reported = [CacheCapacity("L1", l1.size_bytes), CacheCapacity("L2", l2.size_bytes)]
    plateaus = {p.name: p for p in detect_plateaus(sizes, rates, reported, dram_after=None)}
    for name, cache in (("L1", l1), ("L2", l2)):
        assert name in plateaus, f"no {name} plateau in {[(s, f'{r:.3g}') for s, r in zip(sizes, rates)]}"
        assert cache.size_bytes / 2 <= plateaus[name].edge_bytes <= cache.size_bytes * 2


def test_copy_keeps_up_with_numpy_copyto(buffers):
    # reference library: numpy's np.copyto on the same buffers, timed the same way in the same run
    a, b = buffers
    for size in (1 * 2**20, DRAM_BYTES // 4):
        elems = size // 16 // 8 * 8
        src, dst = a[:elems], b[:elems]
        ours = 0.0
        for kernel in (k for k in MEMORY_KERNELS if k.name == "copy"):
            with use_threads(1):
                ours = max(ours, max(sample(kernel.bind(a, b, elems, 1), TINY).rates(16 * elems)))

        def numpy_copy(reps):
            for _ in range(reps):
                np.copyto(dst, src)

        theirs = max(sample(numpy_copy, TINY).rates(16 * elems))
        assert ours >= 0.8 * theirs, (size, ours, theirs)


def test_repetitions_are_not_optimised_away():
    # the time of a read must grow with the repetitions it is asked for
    a = np.ones(4096)
    mem.read_sum(a, 1, 1)
    policy = TimingPolicy(min_seconds=0.0, samples=5)
    t1 = min(sample(lambda r: mem.read_sum(a, r, 1), policy, repetitions=20_000).seconds)
    t2 = min(sample(lambda r: mem.read_sum(a, r, 1), policy, repetitions=80_000).seconds)
    # seconds are per repetition: equal within noise, not four times smaller
    assert t2 > t1 / 2
