"""What dense arithmetic the host sustains: effective clock, multiply-add peak per precision, GEMM rates.

`measure_compute` returns Figures (suites "clock", "compute", "gemm"); `compute_ceilings` folds
them into one row per dtype and thread count for the table, the JSON document and the chart.
One multiply-add (MAC) counts as 2 operations everywhere (common practice).
"""

from __future__ import annotations

import platform
from dataclasses import dataclass, replace
from typing import Any, Callable, Optional, Sequence

import numpy as np

from eaves.errors import BrokenKernelError, InputError
from eaves.peak import (MAX_TILE_MACS_PER_CYCLE, TOLERANCE, TheoreticalBound, check_below, infer_madd_units,
                        infer_tile_macs_per_cycle, lanes_of, theoretical_ops_per_s, units_per_cycle)
from eaves.records import Figure, StepFailure
from eaves.supervisor import Steps, Supervisor, step_seconds
from eaves.threads import check_thread_counts, use_threads
from eaves.timing import TimingPolicy, calibrate, repeat_callable, sample

DTYPES = ("fp64", "fp32", "fp16", "bf16", "int8", "int16")
GEMM_DTYPES = ("fp64", "fp32", "fp16", "bf16", "int8")
MAC_DTYPES = ("int8", "int16")  # the trade quotes integer dot-product rates in MAC/s
# Square GEMM sizes and tall-skinny (M, N=K) shapes; half precision and int8 take a subset.
SQUARE = {"quick": (256, 1024), "full": (128, 256, 512, 1024, 2048)}
SQUARE_LOW = {"quick": (512,), "full": (256, 1024)}
SKINNY_M = {"quick": (1, 64), "full": (1, 2, 4, 8, 16, 32, 64)}
SKINNY_NK = {"quick": 1024, "full": 2048}
INT8_MAX_K = 1024  # int8 products (|x| <= 128) summed in fp32 stay exact while K * 2**14 <= 2**24
MODES = tuple(SQUARE)

Progress = Optional[Callable[[str], None]]


def check_dtypes(dtypes: Sequence[str] | None) -> list[str]:
    """The requested dtypes in survey order; an unknown one is an InputError listing the known ones."""
    if dtypes is None:
        return list(DTYPES)
    unknown = [d for d in dtypes if d not in DTYPES]
    if unknown:
        raise InputError(f"--dtypes: unknown dtype {unknown[0]!r} (known: {', '.join(DTYPES)})")
    return [d for d in DTYPES if d in dtypes]


# ---------------------------------------------------------------- clock


def _verified(run: Callable[[int], int], expected: Callable[[int], int], name: str) -> Callable[[int], int]:
    def call(reps: int) -> int:
        got = run(reps)
        if got != expected(reps):
            raise BrokenKernelError(f"compute: kernel {name} returned checksum {got}, expected {expected(reps)}")
        return got

    return call


def measure_clock(threads: int, policy: TimingPolicy) -> Figure:
    """Effective clock per thread under load: a dependent chain of register adds runs one add per cycle."""
    from eaves.kernels import compute as K

    adds = K.CHAIN_BLOCKS * K.CHAIN_ADDS
    call = _verified(lambda r: int(K.clock_chain(r, threads)), lambda r: K.clock_expected(r, threads), "int-chain")
    with use_threads(threads):
        t = _sample(call, policy)
    return Figure("clock", "int-chain", "int64", threads, "hz", t.rates(adds), t.repetitions, t.min_seconds,
                  variant="dependent register add chain, 1 add per cycle",
                  extra={"adds_per_rep_per_thread": adds})


# ---------------------------------------------------------------- multiply-add peak


def _sample(call: Callable[[int], Any], policy: TimingPolicy):
    """`sample`, calibrated twice: on a shared host one preempted call would otherwise set a too-small count."""
    call(1)
    return sample(call, policy, max(calibrate(call, policy) for _ in range(2)))


def _peak_timing(kernel, threads: int, policy: TimingPolicy):
    call = _verified(lambda r: kernel.run(r, threads), lambda r: _expected(kernel, r, threads), kernel.name)
    with use_threads(threads):
        return _sample(call, policy)


def _expected(kernel, reps: int, threads: int) -> int:
    from eaves.kernels.compute import peak_expected

    return peak_expected(kernel.spec, reps, threads)


def candidates(available) -> list:
    """The two widest native kernels (most MACs per instruction: AMX tiles, then the widest vectors) and the
    widest other path: a native path is not always the fastest."""
    widest = lambda ks: sorted(ks, key=lambda k: -k.spec.macs_per_instruction)
    return widest([k for k in available if k.native])[:2] + widest([k for k in available if not k.native])[:1]


def time_peak(kernel_name: str, threads: int, policy: TimingPolicy):
    """A survey step: the Timing of one registry kernel at `threads` threads, checksums verified."""
    from eaves.kernels.compute import REGISTRY

    kernel = next(k for k in REGISTRY if k.name == kernel_name)
    return _peak_timing(kernel, threads, policy)


@dataclass(frozen=True)
class PeakRun:
    """A timed multiply-add peak kernel at one thread count, before it is checked against the bound."""

    dtype: str
    kernel: Any  # eaves.kernels.compute.PeakKernel
    threads: int
    timing: Any  # eaves.timing.Timing
    alternatives: dict[str, float]  # kernel name -> ops/s at 1 thread, for every kernel tried
    unavailable: dict[str, str] | None = None  # kernel name -> why this host cannot run it (AMX refused)

    @property
    def rates(self) -> tuple[float, ...]:
        return self.timing.rates(self.kernel.ops_per_rep * self.threads)


def run_peak(host, dtype: str, thread_counts: Sequence[int], policy: TimingPolicy, steps: Steps) -> list[PeakRun]:
    """Time the fastest verified kernel of one dtype at each thread count (none if the host has no path).

    The candidates are tried at one thread; a candidate whose step failed is left out."""
    from eaves.kernels.compute import kernels_for, unavailable_reasons

    available = kernels_for(host.features, platform.machine(), dtype)
    tried = {}
    for k in candidates(available):
        t = steps.run(f"compute: trying {k.name} x1", time_peak, (k.name, 1, policy), _peak_seconds(policy),
                      {"suite": "compute", "kernel": k.name, "dtype": dtype, "threads": 1})
        if t is not None:
            tried[k] = k.ops_per_rep / t.best
    if not tried:
        return []
    kernel = max(tried, key=tried.get)
    alternatives = {k.name: rate for k, rate in tried.items()}
    missing = unavailable_reasons(host.features, platform.machine(), dtype) or None
    runs = []
    for n in thread_counts:
        t = steps.run(f"compute: {dtype} multiply-add peak ({kernel.name}) x{n}", time_peak, (kernel.name, n, policy),
                      _peak_seconds(policy), {"suite": "compute", "kernel": kernel.name, "dtype": dtype, "threads": n})
        if t is not None:
            runs.append(PeakRun(dtype, kernel, n, t, alternatives, missing))
    return runs


def _peak_seconds(policy: TimingPolicy) -> float:
    # `_sample` calibrates twice before sampling
    return 2 * step_seconds(policy)


def _bound_terms(host, kernel, ops_per_s_one_core: float, clock_hz: float) -> tuple[int, int, float, dict]:
    """Lanes, units, measured units (or MACs) per cycle, and extra bound facts of one kernel's bound.

    A vector kernel: lanes of the register, units inferred. An AMX kernel: `lanes` is the tile unit's
    MACs per cycle per core, inferred from the measurement and capped (MAX_TILE_MACS_PER_CYCLE), 1 unit.
    """
    if kernel.spec.is_tile:
        macs = infer_tile_macs_per_cycle(ops_per_s_one_core, clock_hz, kernel.dtype, kernel.name)
        return macs, 1, ops_per_s_one_core / clock_hz / 2, {
            "lanes_are": "tile unit MACs per cycle per core (inferred)", "tile_macs_per_instruction":
            kernel.spec.macs_per_instruction, "tile_macs_per_cycle_max": MAX_TILE_MACS_PER_CYCLE[kernel.dtype]}
    lanes = lanes_of(host.vector_bits or kernel.spec.bits, kernel.math_bits)
    return (lanes, infer_madd_units(ops_per_s_one_core, clock_hz, lanes, kernel.name),
            units_per_cycle(ops_per_s_one_core, clock_hz, lanes), {})


def peak_figures(host, runs: Sequence[PeakRun], clock_hz: float) -> list[Figure]:
    """Figures of one dtype's runs, each checked against the theoretical bound.

    `clock_hz` is the highest per-core clock measured at any thread count: a core runs no faster
    with more cores busy, so it bounds every thread count (and contention can only lower rates).
    Multiply-add units are inferred from the best per-core rate of any thread count (a disturbed
    one-thread run must not make an honest two-thread run look impossible); the documented cap
    on units still stops a broken kernel.
    """
    from eaves.kernels.compute import block_instructions

    def cores_of(run):
        return min(run.threads, host.physical_cores or run.threads)

    figures = []
    best = max(runs, key=lambda r: max(r.rates) / cores_of(r))
    terms = _bound_terms(host, best.kernel, max(best.rates) / cores_of(best), clock_hz)
    for run in sorted(runs, key=lambda r: r.threads):
        k, n = run.kernel, run.threads
        cores = cores_of(run)
        lanes, units, ratio, more = terms
        label = "MACs per cycle (tile unit)" if k.spec.is_tile else "lanes"
        bound = TheoreticalBound(theoretical_ops_per_s(cores, clock_hz, lanes, units), cores, clock_hz, lanes, units,
                      lanes_label=label)
        check_below(k.name, max(run.rates), bound)
        why = "; ".join(f"{name} unavailable: {reason}" for name, reason in (run.unavailable or {}).items())
        figures.append(Figure(
            "compute", "madd-peak", run.dtype, n, "ops_per_s", run.rates, run.timing.repetitions,
            run.timing.min_seconds, variant=k.variant + (f" ({why})" if why else ""),
            extra={"kernel": k.name, "vector_bits": k.spec.bits, "accumulators": k.spec.accumulators,
                   "instruction": ", ".join(block_instructions(k.spec)) or "unknown",
                   "native": k.native, "theoretical_ops_per_s": bound.ops_per_s,
                   "bound": {"cores": cores, "clock_hz": clock_hz, "lanes": lanes, "madd_units": units,
                             "madd_units_inferred": True,
                             "units_per_cycle_measured": round(ratio, 3), "tolerance": TOLERANCE, **more},
                   "macs_per_rep_per_thread": k.macs_per_rep, "alternatives_1_thread": run.alternatives,
                   **({"unavailable": run.unavailable} if run.unavailable else {})}))
    return figures


# ---------------------------------------------------------------- GEMM


@dataclass(frozen=True)
class GemmCase:
    """One GEMM to time: C[M,N] = A[M,K] @ B[K,N] of a dtype, through a labelled path."""

    dtype: str
    m: int
    n: int
    k: int

    @property
    def shape(self) -> str:
        return f"{self.m}x{self.n}x{self.k}"

    @property
    def ops(self) -> int:
        """2 M N K: one multiply-add = 2 operations (common practice)."""
        return 2 * self.m * self.n * self.k

    @property
    def bytes(self) -> int:
        """Memory the case holds: operands and result, plus the fp32 copies of the converting paths."""
        elems = self.m * self.k + self.k * self.n + self.m * self.n
        if self.dtype == "fp64":
            return 8 * elems
        return 4 * elems + (2 * elems if self.dtype != "fp32" else 0)


GEMM_PATHS = {
    "fp64": "numpy matmul (dgemm)",
    "fp32": "numpy matmul (sgemm)",
    "fp16": "fp16 storage, converted to fp32 for sgemm (conversion timed); not native",
    "bf16": "bf16 storage, converted to fp32 for sgemm (conversion timed); not native",
    "int8": "int8 storage, converted to fp32 for sgemm, exact for K<=1024 (conversion timed); not native",
}


def gemm_cases(dtypes: Sequence[str], mode: str, max_memory_bytes: int,
               sizes: Sequence[int] | None = None) -> list[GemmCase]:
    """Square and tall-skinny cases; defaults above the memory budget are dropped, explicit ones refused."""
    if mode not in MODES:
        raise InputError(f"compute: unknown mode {mode!r} (known: {', '.join(MODES)})")
    cases = []
    for d in dtypes:
        if d not in GEMM_DTYPES:
            continue
        squares = sizes or (SQUARE if d in ("fp64", "fp32") else SQUARE_LOW)[mode]
        nk = SKINNY_NK[mode] if d != "int8" else min(SKINNY_NK[mode], INT8_MAX_K)
        wanted = [GemmCase(d, s, s, min(s, INT8_MAX_K) if d == "int8" else s) for s in squares]
        if sizes is None:
            ms = SKINNY_M[mode] if d in ("fp64", "fp32") else SKINNY_M[mode][-1:]
            wanted += [GemmCase(d, m, nk, nk) for m in ms]
        for c in wanted:
            if c.bytes > max_memory_bytes:
                if sizes is not None:
                    raise InputError(f"--gemm-sizes: {c.dtype} {c.shape} needs {c.bytes} bytes, above the memory "
                                     f"budget of {max_memory_bytes} bytes")
                continue
            cases.append(c)
    return cases


def _bf16_bits(x: np.ndarray) -> np.ndarray:
    return (x.astype(np.float32).view(np.uint32) >> 16).astype(np.uint16)


def _from_bf16(bits: np.ndarray) -> np.ndarray:
    return (bits.astype(np.uint32) << 16).view(np.float32)


def gemm_call(case: GemmCase, seed: int = 0) -> tuple[Callable[[], np.ndarray], Callable[[np.ndarray], bool]]:
    """The timed call of a case's path, and a check of one result against an independent computation."""
    rng = np.random.default_rng(seed)
    m, n, k = case.m, case.n, case.k
    if case.dtype == "int8":
        a8 = rng.integers(-128, 128, (m, k), dtype=np.int8)
        b8 = rng.integers(-128, 128, (k, n), dtype=np.int8)
        out = np.empty((m, n), np.float32)

        def call():
            return np.matmul(a8.astype(np.float32), b8.astype(np.float32), out=out)

        def check(c):  # numpy's int32 computation of a few rows (a reference library)
            rows = slice(0, min(m, 4))
            return np.array_equal(c[rows].astype(np.int32), a8[rows].astype(np.int32) @ b8.astype(np.int32))

        return call, check
    a = rng.standard_normal((m, k))
    b = rng.standard_normal((k, n))
    if case.dtype in ("fp64", "fp32"):
        t = np.float64 if case.dtype == "fp64" else np.float32
        a, b = a.astype(t), b.astype(t)
        out = np.empty((m, n), t)

        def call():
            return np.matmul(a, b, out=out)
    elif case.dtype == "fp16":
        a, b = a.astype(np.float16), b.astype(np.float16)

        def call():
            return np.matmul(a.astype(np.float32), b.astype(np.float32)).astype(np.float16)
    else:
        a, b = _bf16_bits(a), _bf16_bits(b)

        def call():
            return _bf16_bits(np.matmul(_from_bf16(a), _from_bf16(b)))

    def check(c):
        got = (_from_bf16(c) if case.dtype == "bf16" else c)[:4].astype(np.float64)
        aa = (_from_bf16(a) if case.dtype == "bf16" else a)[:4].astype(np.float64)
        bb = _from_bf16(b) if case.dtype == "bf16" else b
        want = aa @ bb.astype(np.float64)
        tol = {"fp64": 1e-9, "fp32": 1e-3, "fp16": 2e-2, "bf16": 2e-2}[case.dtype] * np.sqrt(k)
        return bool(np.allclose(got, want, rtol=tol, atol=tol))

    return call, check


def blas_info() -> dict[str, Any]:
    """The BLAS numpy calls, as threadpoolctl reports it (library, version, kernel architecture)."""
    from threadpoolctl import threadpool_info

    blas = [i for i in threadpool_info() if i.get("user_api") == "blas"]
    if not blas:
        return {"blas": None}
    b = blas[0]
    return {"blas": b.get("internal_api"), "blas_version": b.get("version"),
            "blas_architecture": b.get("architecture"), "blas_threading": b.get("threading_layer")}


def measure_gemm(case: GemmCase, threads: int, policy: TimingPolicy) -> Figure:
    """Time one GEMM case with the BLAS limited to `threads`; the result is checked once."""
    call, check = gemm_call(case)
    with use_threads(threads):
        if not check(call()):
            raise BrokenKernelError(f"compute: GEMM {case.dtype} {case.shape} returned a wrong product")
        t = sample(repeat_callable(call), policy)
        info = blas_info()
    lib = " ".join(str(info[k]) for k in ("blas", "blas_version", "blas_architecture") if info.get(k))
    return Figure("gemm", "matmul", case.dtype, threads, "ops_per_s", t.rates(case.ops), t.repetitions,
                  t.min_seconds, working_set_bytes=case.bytes, shape=case.shape,
                  variant=f"{GEMM_PATHS[case.dtype]} / {lib or 'no BLAS found'}",
                  extra={**info, "path": GEMM_PATHS[case.dtype], "native": case.dtype in ("fp64", "fp32")})


# ---------------------------------------------------------------- the whole compute survey


def measure_compute(host, thread_counts: Sequence[int], policy: TimingPolicy, dtypes: Sequence[str] | None,
                    max_memory_bytes: int, progress: Progress = None, *, mode: str = "quick",
                    gemm_sizes: Sequence[int] | None = None, runner=None,
                    failures: Optional[list[StepFailure]] = None) -> list[Figure]:
    """Clock, multiply-add peak and GEMM figures for each dtype and thread count.

    Every kernel runs as a step of the `runner` (a Supervisor of its own when none is given); a
    step that fails (wrong checksum, crash, deadline) is appended to `failures` and the others go
    on; a peak above the host's bound is a failure too. Raises InputError for an unknown dtype,
    a thread count out of range or a GEMM size above `max_memory_bytes`.
    """
    chosen = check_dtypes(dtypes)
    counts = check_thread_counts(list(thread_counts))
    cases = gemm_cases(chosen, mode, max_memory_bytes, gemm_sizes)
    failed = failures if failures is not None else []
    own = runner is None
    runner = runner or Supervisor()
    try:
        return _measure_compute(host, counts, policy, chosen, cases, Steps(runner, progress or (lambda m: None), failed))
    finally:
        if own:
            runner.close()


def _clock_step(steps: Steps, threads: int, policy: TimingPolicy) -> Optional[Figure]:
    return steps.run(f"compute: clock (int-chain) x{threads}", measure_clock, (threads, policy), _peak_seconds(policy),
                     {"suite": "clock", "kernel": "int-chain", "threads": threads})


def _measure_compute(host, counts, policy, chosen, cases, steps: Steps) -> list[Figure]:
    figures: list[Figure] = []
    clocks = {n: f for n in counts if (f := _clock_step(steps, n, policy)) is not None}
    runs = [run_peak(host, d, counts, policy, steps) for d in chosen]
    # the clock again after the peaks: the bound takes the best of both, so one noisy sample cannot sink it
    again = _clock_step(steps, counts[0], policy)
    if again is not None:
        first = clocks.get(counts[0])
        clocks[counts[0]] = again if first is None else replace(first, samples=first.samples + again.samples)
    figures += clocks.values()
    if clocks:
        clock_hz = max(f.best for f in clocks.values())
        for r in (r for r in runs if r):
            try:
                figures += peak_figures(host, r, clock_hz)
            except BrokenKernelError as err:  # above the bound: a broken kernel, never a record
                steps.failures.append(StepFailure(f"compute: {r[0].dtype} multiply-add peak", str(err),
                                                  {"suite": "compute", "kernel": r[0].kernel.name, "dtype": r[0].dtype}))
    elif any(runs):
        steps.failures.append(StepFailure("compute: multiply-add peaks", "no clock was measured, so no peak can be "
                                          "checked against the host's bound; the peaks are not reported", {"suite": "compute"}))
    for c in cases:
        for n in counts:
            f = steps.run(f"compute: GEMM {c.dtype} {c.shape} x{n}", measure_gemm, (c, n, policy),
                          step_seconds(policy, ops_per_call=c.ops),
                          {"suite": "gemm", "kernel": "matmul", "dtype": c.dtype, "shape": c.shape, "threads": n})
            if f is not None:
                figures.append(f)
    return figures


# ---------------------------------------------------------------- ceilings for the table, JSON and chart


@dataclass(frozen=True)
class ComputeCeiling:
    """Per dtype and thread count: peak (microkernel), achievable (best GEMM) and the theoretical bound."""

    dtype: str
    threads: int
    peak_ops_per_s: Optional[float]
    peak_variant: Optional[str]
    gemm_ops_per_s: Optional[float]
    gemm_shape: Optional[str]
    theoretical_ops_per_s: Optional[float]
    pct_of_theoretical: Optional[float]  # peak / theoretical x 100
    native: bool
    macs_note: Optional[str]  # the MAC/s figure, where the trade quotes MACs

    @property
    def peak_macs_per_s(self) -> Optional[float]:
        """1 MAC = 2 operations (common practice)."""
        return None if self.peak_ops_per_s is None else self.peak_ops_per_s / 2


def compute_ceilings(figures: Sequence[Figure]) -> list[ComputeCeiling]:
    """One row per (dtype, threads) from compute and gemm figures; medians, best GEMM shape."""
    peaks = {(f.dtype, f.threads): f for f in figures if f.suite == "compute"}
    gemms: dict[tuple[str, int], Figure] = {}
    for f in figures:
        if f.suite == "gemm":
            key = (f.dtype, f.threads)
            if key not in gemms or f.median > gemms[key].median:
                gemms[key] = f
    rows = []
    order = {d: i for i, d in enumerate(DTYPES)}
    for key in sorted(set(peaks) | set(gemms), key=lambda k: (order.get(k[0], 99), k[1])):
        p, g = peaks.get(key), gemms.get(key)
        theo = p.extra.get("theoretical_ops_per_s") if p else None
        peak = p.median if p else None
        note = f"{peak / 2:.4g} MAC/s" if (p and key[0] in MAC_DTYPES) else None
        rows.append(ComputeCeiling(
            key[0], key[1], peak, p.variant if p else None, g.median if g else None, g.shape if g else None,
            theo, (100.0 * peak / theo) if (peak and theo) else None,
            bool(p.extra.get("native")) if p else bool(g and g.extra.get("native")), note))
    return rows


def plot_compute(ceilings: Sequence[ComputeCeiling], path_png: str, path_svg: str | None = None) -> None:
    """Bars per dtype and thread count (peak solid, GEMM hatched) under a tick for the theoretical bound."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    dtypes = [d for d in DTYPES if any(c.dtype == d for c in ceilings)]
    threads = sorted({c.threads for c in ceilings})
    by = {(c.dtype, c.threads): c for c in ceilings}
    width = 0.8 / max(1, len(threads))
    colours = plt.get_cmap("viridis")(np.linspace(0.15, 0.75, max(1, len(threads))))
    fig, ax = plt.subplots(figsize=(1.6 + 1.3 * len(dtypes), 4.2))
    for j, n in enumerate(threads):
        for i, d in enumerate(dtypes):
            c = by.get((d, n))
            if c is None:
                continue
            x = i - 0.4 + (j + 0.5) * width
            if c.peak_ops_per_s:
                ax.bar(x, c.peak_ops_per_s, width * 0.9, color=colours[j], alpha=1.0 if c.native else 0.45,
                       label=f"peak, {n} thr" if i == 0 else None)
            if c.gemm_ops_per_s:
                ax.bar(x, c.gemm_ops_per_s, width * 0.5, color="white", edgecolor="black", hatch="///",
                       label="best GEMM" if (i == 0 and j == 0) else None)
            if c.theoretical_ops_per_s:
                ax.hlines(c.theoretical_ops_per_s, x - width / 2, x + width / 2, colors="crimson", linewidth=2,
                          label="theoretical" if (i == 0 and j == 0) else None)
    ax.set_xticks(range(len(dtypes)), dtypes)
    ax.set_yscale("log")
    ax.set_ylabel("operations per second (1 MAC = 2 ops)")
    ax.set_title("compute ceilings (faded bar: not native)", fontsize=10)
    ax.grid(axis="y", which="both", alpha=0.3)
    ax.legend(fontsize=7, ncol=2)
    fig.tight_layout()
    fig.savefig(path_png, dpi=120)
    if path_svg:
        fig.savefig(path_svg)
    plt.close(fig)
