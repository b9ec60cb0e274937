"""Compare eaves' fp64/fp32 multiply-add peak with a C loop (gcc -O3 -march=native) on this host, same run.

Run: python tests/benchmarks/compare_compute.py   (needs gcc; prints eaves vs C and their ratio)
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import tempfile

HERE = os.path.dirname(os.path.abspath(__file__))


def build_c_peak(workdir: str) -> str | None:
    """Compile c_peak.c with OpenMP; None when no gcc is installed."""
    if shutil.which("gcc") is None:
        return None
    exe = os.path.join(workdir, "c_peak")
    subprocess.run(["gcc", "-O3", "-march=native", "-fopenmp", os.path.join(HERE, "c_peak.c"), "-o", exe],
                   check=True)
    return exe


def c_rate(exe: str, dtype: str, threads: int, seconds: float = 0.05) -> float:
    out = subprocess.run([exe, {"fp64": "f64", "fp32": "f32"}[dtype], str(threads), str(seconds)],
                         check=True, capture_output=True, text=True).stdout.split()
    if out[1] != "1":
        raise RuntimeError(f"c_peak {dtype}: wrong checksum")
    return float(out[0])


def eaves_rate(dtype: str, threads: int, seconds: float = 0.05) -> float:
    import platform

    from eaves.compute import _peak_timing
    from eaves.host import collect_host_facts
    from eaves.kernels.compute import kernels_for
    from eaves.timing import TimingPolicy

    host = collect_host_facts()
    k = max(kernels_for(host.features, platform.machine(), dtype), key=lambda k: (k.native, k.spec.bits))
    t = _peak_timing(k, threads, TimingPolicy(min_seconds=seconds, samples=7))
    return k.ops_per_rep * threads / t.best


def compare_peak(rounds: int = 3) -> list[tuple[str, int, float, float]]:
    """(dtype, threads, eaves ops/s, C ops/s): best of `rounds` interleaved measurements each."""
    from eaves.threads import usable_cpus

    with tempfile.TemporaryDirectory() as tmp:
        exe = build_c_peak(tmp)
        if exe is None:
            print("gcc not found: no C comparison", file=sys.stderr)
            return []
        rows = []
        for dtype in ("fp64", "fp32"):
            for n in sorted({1, usable_cpus()}):
                e = c = 0.0
                for _ in range(rounds):  # interleaved, so both see the same load from other processes
                    e = max(e, eaves_rate(dtype, n))
                    c = max(c, c_rate(exe, dtype, n))
                rows.append((dtype, n, e, c))
        return rows


def main() -> int:
    rows = compare_peak()
    print(f"{'dtype':6} {'threads':>7} {'eaves GFLOP/s':>14} {'C GFLOP/s':>10} {'eaves/C':>8}")
    for dtype, n, e, c in rows:
        print(f"{dtype:6} {n:7d} {e / 1e9:14.1f} {c / 1e9:10.1f} {e / c:8.3f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
