"""Compute ceilings: kernels verify, rates respect the host's bound, GEMM figures match numpy, bad input refused."""

from __future__ import annotations

import platform
import time

import numpy as np
import pytest

from eaves.compute import (GEMM_PATHS, ComputeCeiling, GemmCase, check_dtypes, compute_ceilings, gemm_call, gemm_cases,
                           measure_clock, measure_compute, measure_gemm, plot_compute)
from eaves.errors import EXIT_INPUT, BrokenKernelError, InputError
from eaves.host import collect_host_facts
from eaves.kernels import compute as K
from eaves.peak import (MAX_TILE_MACS_PER_CYCLE, TheoreticalBound, check_below, infer_madd_units,
                        infer_tile_macs_per_cycle, lanes_of, theoretical_ops_per_s)
from eaves.records import Figure
from eaves.threads import usable_cpus, use_threads
from eaves.timing import TimingPolicy

HOST = collect_host_facts()
ARCH = platform.machine()
AVAILABLE = K.kernels_for(HOST.features, ARCH)
TINY = TimingPolicy.tiny()
BEST_OF = TimingPolicy(min_seconds=0.003, samples=7)  # more samples: the best one escapes other load


# ---------------------------------------------------------------- formulas (no measurement)


def test_one_mac_counts_two_operations():
    # 1 multiply-accumulate = 2 floating-point operations (common practice)
    assert GemmCase("fp32", 3, 5, 7).ops == 2 * 3 * 5 * 7
    for k in K.REGISTRY:
        assert k.ops_per_rep == 2 * k.macs_per_rep
    c = ComputeCeiling("int8", 1, 8e11, "x", None, None, 1e12, 80.0, True, None)
    assert c.peak_macs_per_s == 4e11


def test_theoretical_peak_worked_example():
    # peak = clock x processing elements x operations per cycle (common practice), by hand:
    # 4 cores, 3.0 GHz, 512-bit registers hold 16 fp32 lanes, 2 FMA units, 2 ops per FMA
    # -> 4 * 3.0e9 * 16 * 2 * 2 = 768e9 op/s
    assert lanes_of(512, 32) == 16 and lanes_of(256, 64) == 4 and lanes_of(512, 8) == 64
    assert theoretical_ops_per_s(4, 3.0e9, 16, 2) == pytest.approx(768e9)
    # one core of the same host, fp64 (8 lanes): 3.0e9 * 8 * 2 * 2 = 96e9
    assert theoretical_ops_per_s(1, 3.0e9, lanes_of(512, 64), 2) == pytest.approx(96e9)


def test_units_are_inferred_and_capped():
    one_unit = 3.0e9 * 16 * 2  # one fp32 FMA unit at 3 GHz
    assert infer_madd_units(2 * one_unit, 3.0e9, 16, "k") == 2
    assert infer_madd_units(2.03 * one_unit, 3.0e9, 16, "k") == 2  # within the tolerance: nearest
    assert infer_madd_units(1.4 * one_unit, 3.0e9, 16, "k") == 2  # contention only lowers a ratio
    assert infer_madd_units(0.3 * one_unit, 3.0e9, 16, "k") == 1
    with pytest.raises(BrokenKernelError, match="kernel k"):
        infer_madd_units(9 * one_unit, 3.0e9, 16, "k")


def test_rate_above_bound_is_a_broken_kernel():
    bound = TheoreticalBound(100.0, 1, 1.0, 25, 2)
    check_below("fine", 104.0, bound)
    with pytest.raises(BrokenKernelError, match="fp32-fma-512") as err:
        check_below("fp32-fma-512", 106.0, bound)
    assert err.value.exit_code == 4


# ---------------------------------------------------------------- kernels verify


@pytest.mark.parametrize("kernel", AVAILABLE, ids=lambda k: k.name)
def test_kernel_checksum(kernel):
    # fp kernels against their closed form, integer kernels against numpy's int32 simulation
    for reps, n in ((1, 1), (11, min(2, usable_cpus()))):
        got = kernel.run(reps, n)
        assert kernel.verify(got, reps, n)
        assert not kernel.verify(got + 1, reps, n)


def _python_int_chain(kind: str, seed: int) -> int:
    """The integer block's chain for one lane in plain Python, independent of numpy."""
    group, pattern = (4, K.INT8_PATTERN) if kind in ("i8dot", "i8madd") else (2, K.INT16_PATTERN)
    bits = 32 // group

    def part(x, j, signed):
        v = (x >> (bits * j)) & ((1 << bits) - 1)
        return v - (1 << bits) if signed and v >= 1 << (bits - 1) else v

    acc = seed
    for _ in range(K.STEPS):
        dot = sum(part(pattern, j, group == 2) * part(acc, j, True) for j in range(group))
        acc = (acc + dot) & 0xFFFFFFFF
    return acc - (1 << 32) if acc >= 1 << 31 else acc


@pytest.mark.parametrize("kind", ["i8dot", "i16dot", "i8madd", "i16madd"])
def test_integer_closed_form_matches_python(kind):
    spec = next(s for s in K.SPECS if s.kind == kind)
    n = spec.accumulators * spec.acc_lanes
    assert K.block_values(spec)[:2] == tuple(n * _python_int_chain(kind, s) for s in (1, 2))


@pytest.mark.parametrize("kernel", [k for k in AVAILABLE if k.native], ids=lambda k: k.name)
def test_native_kernels_emit_their_instruction(kernel):
    # what LLVM emits for this host: the label must not claim a path the code does not take
    found = " ".join(K.block_instructions(kernel.spec))
    if ARCH == "x86_64":
        want = {"fma": "vfmadd", "bf16dot": "vdpbf16ps", "i8dot": "vpdpbusd", "i16dot": "vpdpwssd",
                "amx_bf16": "tdpbf16ps", "amx_i8": "tdpbusd", "i8madd": "pmaddubsw", "i16madd": "pmaddwd"
                }[kernel.spec.kind]
        width = "tmm" if kernel.spec.is_tile else {512: "zmm", 256: "ymm", 128: "xmm"}[kernel.spec.bits]
        assert want in found and width in found
        if kernel.spec.kind == "i8madd":  # the pair: u8 x s8 into s16, then pmaddwd widens into s32
            assert "pmaddwd" in found
    else:
        assert found


# ---------------------------------------------------------------- AMX tiles (no measurement)

TILE_SPECS = [K.SPECS[k.spec_index] for k in K.REGISTRY if k.spec.is_tile]


@pytest.mark.parametrize("spec", TILE_SPECS, ids=lambda s: s.kind)
def test_tile_mac_count_matches_the_tile_shapes(spec):
    # Intel's instruction set reference (from memory): a tdp* op on 16-row x 64-byte tiles computes
    # C[16 x 16] += A[16 x K] @ B[K x 16], K = 64 bytes / element size: 32 bf16 or 64 int8.
    assert spec.macs_per_instruction == {"amx_bf16": 16 * 16 * 32, "amx_i8": 16 * 16 * 64}[spec.kind]
    # the same count from the numpy model's matrix shapes: M x N x K of each product
    m, n = K.tile_products(spec).shape[1:]
    k = K.TILE_COLSB // (2 if spec.kind == "amx_bf16" else 1)
    assert (m, n) == (K.TILE_ROWS, K.TILE_COLSB // 4) and m * n * k == spec.macs_per_instruction


@pytest.mark.parametrize("spec", TILE_SPECS, ids=lambda s: s.kind)
def test_tile_model_matches_an_elementwise_loop(spec):
    # the numpy tile model against a plain Python reading of one C element from the raw tile bytes
    data = K.tile_operands(spec)
    n_a = K.tile_counts(spec.accumulators)[0]
    (a, b), group = K.tile_pairs(spec.accumulators)[-1], (2 if spec.kind == "amx_bf16" else 4)
    want = K.tile_products(spec)[-1]
    for i, j in ((0, 0), (5, 11), (15, 15)):
        total = 0.0
        for kk in range(K.TILE_ROWS):  # B row kk, column j holds `group` consecutive K entries of that column
            for g in range(group):
                if group == 2:
                    x, y = _bf16(data[a, i], kk * 2 + g), _bf16(data[n_a + b, kk], j * 2 + g)
                else:
                    x, y = int(data[a, i, kk * 4 + g]), (int(data[n_a + b, kk, j * 4 + g]) ^ 0x80) - 0x80
                total += x * y
        assert want[i, j] == total


def _bf16(row, index):
    """The bf16 at `index` of a row of little-endian bytes, by its definition: the top half of an fp32."""
    bits = (int(row[2 * index]) | int(row[2 * index + 1]) << 8) << 16
    return float(np.array([bits], np.uint32).view(np.float32)[0])


def test_amx_permission_refused_gives_a_reason():
    # a refused request (the OS's answer, faked) or a host that cannot ask: unavailable, with a readable reason
    refused = K.request_amx(syscall=lambda *args: (-1, 22), system="Linux", machine="x86_64")
    assert not refused.granted and "EINVAL" not in refused.reason
    assert "arch_prctl" in refused.reason and "Invalid argument" in refused.reason and "errno 22" in refused.reason
    other = K.request_amx(syscall=lambda *args: (0, 0), system="Darwin", machine="arm64")
    assert not other.granted and "Darwin arm64" in other.reason
    assert K.request_amx(syscall=lambda *args: (0, 0), system="Linux", machine="x86_64").granted


def test_amx_entries_follow_the_permission(monkeypatch):
    tiles = [k for k in K.REGISTRY if k.spec.is_tile]
    features = tuple(sorted({f for k in tiles for f in k.requires}))
    monkeypatch.setattr(K, "amx_access", lambda: K.AmxAccess(False, "refused for the test"))
    assert not [k for k in K.kernels_for(features, "x86_64") if k.spec.is_tile]
    assert set(K.unavailable_reasons(features, "x86_64")) == {k.name for k in tiles}
    assert K.unavailable_reasons(features, "x86_64", "bf16") == {"bf16-amx-4x": "refused for the test"}
    assert K.unavailable_reasons((), "x86_64") == {}  # no AMX flags: nothing to explain
    with pytest.raises(RuntimeError, match="refused for the test"):  # never a tile instruction without leave
        K._entry.__wrapped__(tiles[0].spec_index)


def test_tile_bound_is_inferred_and_capped():
    # MACs per cycle per core: 8192-MAC tdpbf16ps every 16 cycles = 512 (from memory, see bench/peak.py)
    clock = 3.0e9
    assert infer_tile_macs_per_cycle(2 * 450 * clock, clock, "bf16", "k") == 512
    assert infer_tile_macs_per_cycle(2 * 530 * clock, clock, "bf16", "k") == 512  # within the tolerance
    assert infer_tile_macs_per_cycle(2 * 200 * clock, clock, "bf16", "k") == 256
    assert infer_tile_macs_per_cycle(2 * 900 * clock, clock, "int8", "k") == MAX_TILE_MACS_PER_CYCLE["int8"]
    with pytest.raises(BrokenKernelError, match="kernel k"):
        infer_tile_macs_per_cycle(2 * 600 * clock, clock, "bf16", "k")
    bound = TheoreticalBound(theoretical_ops_per_s(1, clock, 512, 1), 1, clock, 512, 1,
                             lanes_label="MACs per cycle (tile unit)")
    assert bound.ops_per_s == pytest.approx(3.072e12)  # 1 core x 3 GHz x 512 MACs x 2 ops, by hand
    with pytest.raises(BrokenKernelError, match="512 MACs per cycle"):
        check_below("bf16-amx-4x", 3.3e12, bound)


# ---------------------------------------------------------------- measured relations


def _rate(dtype: str, threads: int = 1) -> float:
    from eaves.compute import _peak_timing

    k = K.kernels_for(HOST.features, ARCH, dtype)[0]
    return k.ops_per_rep * threads / _peak_timing(k, threads, BEST_OF).best


@pytest.mark.skipif(HOST.vector_bits is None or HOST.vector_bits < 128, reason="host without SIMD registers")
def test_fp32_peak_beats_fp64_peak():
    # twice the lanes per register: fp32 must be faster than fp64 on any SIMD host
    assert _rate("fp32") > 1.2 * _rate("fp64")


@pytest.mark.skipif(HOST.nominal_hz is None, reason="the OS reports no advertised clock")
def test_clock_estimate_within_advertised_range():
    # advertised frequency: host facts read from /proc/cpuinfo or py-cpuinfo (the OS's report).
    # Turbo can exceed nominal, so the upper end is 1.5x; contention only lowers a best sample.
    f = measure_clock(1, BEST_OF)
    assert 0.95 * HOST.nominal_hz <= f.best <= 1.5 * HOST.nominal_hz


def test_survey_relations_hold():
    figs = measure_compute(HOST, [1], TINY, ["fp64", "fp32", "int8"], 64 << 20, gemm_sizes=[256])
    clock = [f for f in figs if f.suite == "clock"]
    peaks = {f.dtype: f for f in figs if f.suite == "compute"}
    gemms = [f for f in figs if f.suite == "gemm"]
    assert len(clock) == 1 and set(peaks) == {"fp64", "fp32", "int8"} and len(gemms) == 3
    for f in peaks.values():
        # every rate at or below the theoretical bound (plus its stated tolerance)
        assert f.best <= f.extra["theoretical_ops_per_s"] * (1 + f.extra["bound"]["tolerance"])
        assert {"vector_bits", "accumulators", "instruction", "native"} <= set(f.extra)
    for g in gemms:
        # no real kernel beats the machine's peak of the arithmetic it runs: a native GEMM (dgemm, sgemm) is
        # bounded by its own dtype's peak; int8 storage converted for sgemm runs fp32 FMAs (GEMM_PATHS), so the
        # fp32 peak bounds it, not the int8 one (a native int8 path may be faster or slower than fp32 FMA)
        math = g.dtype if g.extra["native"] else "fp32"
        assert g.extra["native"] or "converted to fp32" in g.extra["path"]
        roof = peaks[math]  # its best 1-thread rate in this run: timed samples and the kernel's try-out
        assert g.best <= max(roof.best, roof.extra["alternatives_1_thread"][roof.extra["kernel"]]) * 1.05
        assert g.extra.get("blas") and g.shape == ("256x256x256")
    rows = compute_ceilings(figs)
    assert {(r.dtype, r.threads) for r in rows} == {("fp64", 1), ("fp32", 1), ("int8", 1)}


@pytest.mark.skipif(not any(k.spec.is_tile for k in AVAILABLE), reason="no AMX tiles usable on this host")
def test_amx_host_roofs_come_from_the_tiles():
    # on an AMX host the fastest verified path per dtype is the tile unit, bounded by the tile bound,
    # while the GEMM rows keep their own (fp32 BLAS) labels
    figs = measure_compute(HOST, [1], TINY, ["bf16", "int8"], 64 << 20, gemm_sizes=[256])
    peaks = {f.dtype: f for f in figs if f.suite == "compute"}
    for dtype, mnemonic in (("bf16", "tdpbf16ps"), ("int8", "tdpbusd")):
        f = peaks[dtype]
        assert f.extra["native"] and f.extra["kernel"].endswith("-amx-4x") and mnemonic in f.variant
        assert f.extra["instruction"].startswith(mnemonic)
        # faster than every vector kernel tried: a tile product does 128x the MACs of a zmm dot product
        assert f.extra["alternatives_1_thread"][f.extra["kernel"]] == max(f.extra["alternatives_1_thread"].values())
        assert f.best <= f.extra["theoretical_ops_per_s"] * (1 + f.extra["bound"]["tolerance"])
        assert f.extra["bound"]["lanes"] <= f.extra["bound"]["tile_macs_per_cycle_max"]
    for g in (f for f in figs if f.suite == "gemm"):
        assert g.extra["path"] == GEMM_PATHS[g.dtype] and "not native" in g.variant and not g.extra["native"]


def test_gemm_figure_matches_numpy_matmul():
    # a reference library timed directly: the harness adds no meaningful overhead
    case = GemmCase("fp32", 192, 192, 192)
    fig = measure_gemm(case, 1, BEST_OF)
    a = np.ones((192, 192), np.float32)
    out = np.empty_like(a)
    with use_threads(1):
        reps = max(1, fig.repetitions)
        best = float("inf")
        for _ in range(7):
            t0 = time.perf_counter()
            for _ in range(reps):
                np.matmul(a, a, out=out)
            best = min(best, (time.perf_counter() - t0) / reps)
    direct = case.ops / best
    assert 0.7 * direct <= fig.best <= 1.3 * direct


@pytest.mark.parametrize("dtype", ["fp16", "bf16", "int8"])
def test_low_precision_gemm_paths_check_out(dtype):
    call, check = gemm_call(GemmCase(dtype, 8, 32, 64))
    out = call()
    assert check(out)
    assert not check(np.zeros_like(out) + (1 if dtype != "bf16" else 0x3F80))


# ---------------------------------------------------------------- ceilings and chart (pure)


def _fig(suite, dtype, threads, value, **kw):
    return Figure(suite, "x", dtype, threads, "ops_per_s", (value,), 1, 0.01, **kw)


def test_ceilings_pick_best_gemm_and_percent(tmp_path):
    figs = [_fig("compute", "int8", 2, 800.0, variant="v", extra={"theoretical_ops_per_s": 1000.0, "native": True}),
            _fig("gemm", "int8", 2, 100.0, shape="8x8x8"), _fig("gemm", "int8", 2, 300.0, shape="64x64x64"),
            _fig("gemm", "fp64", 1, 5.0, shape="4x4x4", extra={"native": True})]
    rows = compute_ceilings(figs)
    assert rows[0].dtype == "fp64" and rows[0].peak_ops_per_s is None
    r = rows[1]
    assert (r.gemm_ops_per_s, r.gemm_shape, r.pct_of_theoretical) == (300.0, "64x64x64", 80.0)
    assert r.macs_note == "400 MAC/s"
    plot_compute(rows, str(tmp_path / "c.png"), str(tmp_path / "c.svg"))
    assert (tmp_path / "c.png").stat().st_size > 1000 and (tmp_path / "c.svg").exists()


# ---------------------------------------------------------------- bad input


def test_bad_input_is_refused_with_exit_code_2():
    with pytest.raises(InputError, match="known: fp64, fp32") as err:
        check_dtypes(["fp32", "fp8"])
    assert err.value.exit_code == EXIT_INPUT
    with pytest.raises(InputError, match="memory budget"):
        gemm_cases(["fp64"], "quick", 1 << 20, sizes=[1024])
    with pytest.raises(InputError, match="mode"):
        gemm_cases(["fp64"], "slow", 1 << 30)
    with pytest.raises(InputError, match="--threads"):
        measure_compute(HOST, [usable_cpus() + 1], TINY, ["fp64"], 1 << 30)
    # defaults above the budget are dropped, not refused
    assert all(c.bytes <= 1 << 22 for c in gemm_cases(["fp64"], "full", 1 << 22))
