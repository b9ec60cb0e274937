"""Does the harness add overhead to GEMM? eaves' GEMM figure against np.matmul timed directly, same run.

Run: python tests/benchmarks/gemm_overhead.py   (target: within 3%)
Rounds alternate the harness (measure_gemm: calibrated repetitions, median of samples) and a
plain loop of np.matmul (the median of the same number of timed calls); the median ratio is printed.
"""

from __future__ import annotations

import statistics
import time


from eaves.compute import GemmCase, gemm_call, measure_gemm
from eaves.threads import use_threads, usable_cpus
from eaves.timing import TimingPolicy

POLICY = TimingPolicy(min_seconds=0.05, samples=7)


def direct(case: GemmCase, threads: int, reps: int) -> float:
    """OP/s of np.matmul called in a plain loop, median of POLICY.samples timed calls."""
    call, _ = gemm_call(case)
    with use_threads(threads):
        call()
        rates = []
        for _ in range(POLICY.samples):
            start = time.perf_counter()
            for _ in range(reps):
                call()
            rates.append(case.ops * reps / (time.perf_counter() - start))
    return statistics.median(rates)


def main() -> None:
    print(f"{'shape':>16} {'dtype':5} {'thr':>3} {'eaves':>10} {'direct':>10} {'ratio':>6}")
    for case in (GemmCase("fp64", 1024, 1024, 1024), GemmCase("fp32", 1024, 1024, 1024),
                 GemmCase("fp32", 2048, 2048, 2048), GemmCase("fp32", 16, 2048, 2048)):
        for threads in sorted({1, usable_cpus()}):
            ratios, ours, theirs = [], [], []
            for _ in range(3):
                fig = measure_gemm(case, threads, POLICY)
                d = direct(case, threads, fig.repetitions)
                ratios.append(fig.median / d)
                ours.append(fig.median)
                theirs.append(d)
            print(f"{case.shape:>16} {case.dtype:5} {threads:>3} {statistics.median(ours) / 1e9:9.1f}G "
                  f"{statistics.median(theirs) / 1e9:9.1f}G {statistics.median(ratios):6.3f}")


if __name__ == "__main__":
    main()
