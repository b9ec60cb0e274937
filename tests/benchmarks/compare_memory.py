"""Compare eaves' memory kernels with C/OpenMP loops (gcc -O3 -march=native -fopenmp), same host, same run.

Run: python tests/benchmarks/compare_memory.py [--dram-bytes SIZE]
Prints, for read/write/copy/axpy at an L1 size, an L2 size and a DRAM size, at 1 thread and all
threads: the best eaves variant, the C loop, and their ratio (targets: DRAM within 5%, L1 and L2
read within 20%). Rounds alternate eaves and C; the best of each is kept. The DRAM size defaults to
the survey's DRAM working set; one below 8x every cache of a socket is refused (its figure would be
partly a cache's).
"""

from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import tempfile

from eaves.host import collect_host_facts
from eaves.kernels import MEMORY_KERNELS
from eaves.kernels.streaming import aligned_empty
from eaves.memory_survey import DRAM_CACHE_MULTIPLE, dram_working_set
from eaves.threads import use_threads, usable_cpus
from eaves.timing import TimingPolicy, sample
from eaves.units import format_bytes, format_rate, parse_size

HERE = os.path.dirname(os.path.abspath(__file__))
POLICY = TimingPolicy(min_seconds=0.05, samples=5)


def build(workdir: str) -> str | None:
    if shutil.which("gcc") is None:
        return None
    exe = os.path.join(workdir, "c_bandwidth")
    subprocess.run(["gcc", "-O3", "-march=native", "-fopenmp", os.path.join(HERE, "c_bandwidth.c"), "-o", exe],
                   check=True)
    return exe


def c_rate(exe: str, kernel: str, size: int, threads: int) -> float:
    out = subprocess.run([exe, kernel, str(size), str(threads), str(POLICY.min_seconds)], check=True,
                         capture_output=True, text=True).stdout.split()
    if out[1] != "1":
        raise RuntimeError(f"c_bandwidth {kernel}: wrong checksum")
    return float(out[0])


def eaves_rates(a, b, kernel: str, size: int, threads: int) -> dict[str, float]:
    """Best sample of every variant of `kernel` (full-width vectors, compiled loop, streaming ...)."""
    rates = {}
    for k in (k for k in MEMORY_KERNELS if k.name == kernel):
        elems = size // (8 * k.arrays) // 8 * 8
        with use_threads(threads):
            timing = sample(k.bind(a, b, elems, threads), POLICY)
        rates[k.variant] = max(timing.rates(k.bytes_per_elem * elems))
    return rates


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    host = collect_host_facts()
    socket = host.socket_cache_bytes()
    parser.add_argument("--dram-bytes", default=str(dram_working_set(socket)))
    parser.add_argument("--rounds", type=int, default=2)
    args = parser.parse_args()
    dram = parse_size(args.dram_bytes)
    if socket is None:
        print("warning: the OS reports no cache sizes: cannot check that the DRAM size is past every cache")
    elif dram < DRAM_CACHE_MULTIPLE * socket:
        parser.error(f"--dram-bytes {format_bytes(dram)} is below {DRAM_CACHE_MULTIPLE}x this socket's caches "
                     f"({format_bytes(socket)}): the figure would be partly a cache's; use at least "
                     f"{format_bytes(dram_working_set(socket))}")
    l2 = host.cache(2)
    sizes = {"L1": 16 * 1024, "L2": (l2.size_bytes // 2) if l2 else 512 * 1024, "DRAM": dram}
    a, b = aligned_empty(dram // 8), aligned_empty(dram // 8)
    with tempfile.TemporaryDirectory() as tmp:
        exe = build(tmp)
        if exe is None:
            print("gcc not found: nothing to compare against")
            return
        times = f", {dram / socket:.1f}x the socket's caches" if socket else ""
        print(f"host {host.host_key()}, {host.model}; eaves best variant vs C, best of {args.rounds} rounds; "
              f"DRAM at {format_bytes(dram)}{times}")
        print(f"{'level':6} {'kernel':6} {'thr':>3} {'eaves best':>12} {'eaves loop':>12} {'C loop':>12} "
              f"{'best/C':>6} {'loop/C':>6}  best variant")
        for level, size in sizes.items():
            for kernel in ("read", "write", "copy", "axpy"):
                for threads in sorted({1, usable_cpus()}):
                    best: dict[str, float] = {}
                    theirs = 0.0
                    for _ in range(args.rounds):
                        for variant, rate in eaves_rates(a, b, kernel, size, threads).items():
                            best[variant] = max(best.get(variant, 0.0), rate)
                        theirs = max(theirs, c_rate(exe, kernel, size, threads))
                    how = max(best, key=best.get)
                    loop = best["compiled loop"]
                    print(f"{level:6} {kernel:6} {threads:>3} {format_rate(best[how], 'B/s'):>12} "
                          f"{format_rate(loop, 'B/s'):>12} {format_rate(theirs, 'B/s'):>12} "
                          f"{best[how] / theirs:6.2f} {loop / theirs:6.2f}  {how}")


if __name__ == "__main__":
    main()
