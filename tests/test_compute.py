"""Compute ceilings: kernels verify, rates respect the host's bound, GEMM figures match numpy, bad input refused."""

from __future__ import annotations

import platform
import time

import numpy as np
import pytest

from eaves.compute import (ComputeCeiling, GemmCase, check_dtypes, compute_ceilings, gemm_call, gemm_cases,
                           measure_clock, measure_compute, measure_gemm, plot_compute)
from eaves.errors import EXIT_INPUT, BrokenKernelError, InputError
from eaves.host import collect_host_facts
from eaves.kernels import compute as K
from eaves.peak import Bound, check_below, infer_madd_units, lanes_of, theoretical_ops_per_s
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
    bound = Bound(100.0, 1, 1.0, 25, 2)
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
    group, pattern = (4, K.INT8_PATTERN) if kind == "i8dot" else (2, K.INT16_PATTERN)
    bits = 32 // group

    def part(x, j, signed):
        v = (x >> (bits * j)) & ((1 << bits) - 1)
        return v - (1 << bits) if signed and v >= 1 << (bits - 1) else v

    acc = seed
    for _ in range(K.STEPS):
        dot = sum(part(pattern, j, group == 2) * part(acc, j, True) for j in range(group))
        acc = (acc + dot) & 0xFFFFFFFF
    return acc - (1 << 32) if acc >= 1 << 31 else acc


@pytest.mark.parametrize("kind", ["i8dot", "i16dot"])
def test_integer_closed_form_matches_python(kind):
    spec = next(s for s in K.SPECS if s.kind == kind)
    n = spec.accumulators * spec.acc_lanes
    assert K.block_values(spec)[:2] == tuple(n * _python_int_chain(kind, s) for s in (1, 2))


@pytest.mark.parametrize("kernel", [k for k in AVAILABLE if k.native], ids=lambda k: k.name)
def test_native_kernels_emit_their_instruction(kernel):
    # what LLVM emits for this host: the label must not claim a path the code does not take
    found = " ".join(K.block_instructions(kernel.spec))
    if ARCH == "x86_64":
        want = {"fma": "vfmadd", "bf16dot": "vdpbf16ps", "i8dot": "vpdpbusd", "i16dot": "vpdpwssd"}[kernel.spec.kind]
        width = {512: "zmm", 256: "ymm", 128: "xmm"}[kernel.spec.bits]
        assert want in found and width in found
    else:
        assert found


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
        # no real kernel beats the machine's peak: best GEMM <= multiply-add peak of the same dtype
        assert g.best <= peaks[g.dtype].best * 1.05
        assert g.extra.get("blas") and g.shape == ("256x256x256")
    rows = compute_ceilings(figs)
    assert {(r.dtype, r.threads) for r in rows} == {("fp64", 1), ("fp32", 1), ("int8", 1)}


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
