"""Synthetic survey figures of an invented host, for tests of the roofline model and placement.

The numbers are invented test data (round values that make hand checks easy), not measurements.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path
from typing import Any

from eaves.records import Figure, RunRecord
from eaves.store import Store

HOSTNAME = "fennick-bench-01"
HOST_KEY = f"{HOSTNAME}-0badc0de"
KIB, MIB = 1024, 1024 * 1024

# bytes/s of each memory kernel per level at 1 thread; 2 threads double every level but DRAM (1.5x)
MEMORY_1T = {"L1": {"read": 200e9, "copy": 150e9, "axpy": 160e9, "write": 100e9},
             "L2": {"read": 100e9, "copy": 80e9, "axpy": 90e9, "write": 60e9},
             "L3": {"read": 50e9, "copy": 40e9, "axpy": 45e9, "write": 55e9},
             "DRAM": {"read": 20e9, "copy": 15e9, "axpy": 16e9, "write": 12e9}}
WORKING_SET = {"L1": 16 * KIB, "L2": 512 * KIB, "L3": 8 * MIB, "DRAM": 256 * MIB}
PEAK_1T = {"fp64": 50e9, "fp32": 100e9, "int8": 400e9}  # multiply-add peak, ops/s
GEMM_1T = {"fp64": 40e9, "fp32": 80e9}
CACHES = [dict(level=1, kind="data", size_bytes=32 * KIB, line_bytes=64, shared_cpus=1, instances=2),
          dict(level=1, kind="instruction", size_bytes=32 * KIB, line_bytes=64, shared_cpus=1, instances=2),
          dict(level=2, kind="unified", size_bytes=1 * MIB, line_bytes=64, shared_cpus=1, instances=2),
          dict(level=3, kind="unified", size_bytes=16 * MIB, line_bytes=64, shared_cpus=2, instances=1)]


def _fig(suite: str, kernel: str, dtype: str, threads: int, unit: str, value: float, **kw: Any) -> Figure:
    # three samples around the value: the median is the value itself
    return Figure(suite=suite, kernel=kernel, dtype=dtype, threads=threads, unit=unit,
                  samples=(value * 0.98, value, value * 1.01), repetitions=10, min_seconds=0.01, **kw)


def synthetic_figures(scale: float = 1.0, threads: tuple[int, ...] = (1, 2)) -> list[Figure]:
    """Memory, compute and GEMM figures at 1 and 2 threads; `scale` multiplies every rate."""
    figs = []
    for t in threads:
        for level, kernels in MEMORY_1T.items():
            factor = t if level != "DRAM" else 1 + 0.5 * (t - 1)
            for kernel, value in kernels.items():
                figs.append(_fig("memory", kernel, "fp64", t, "bytes_per_s", value * factor * scale,
                                 cache_level=level, working_set_bytes=WORKING_SET[level], variant="store"))
        for dtype, value in PEAK_1T.items():
            figs.append(_fig("compute", "madd-peak", dtype, t, "ops_per_s", value * t * scale,
                             extra={"native": True, "theoretical_ops_per_s": value * t * 1.2 * scale}))
        for dtype, value in GEMM_1T.items():
            figs.append(_fig("gemm", "matmul", dtype, t, "ops_per_s", value * t * scale, shape="512x512x512"))
            figs.append(_fig("gemm", "matmul", dtype, t, "ops_per_s", value * t * scale / 2, shape="64x64x64"))
    # figures of other suites must be ignored by the model
    figs.append(_fig("latency", "chase", "fp64", 1, "ns_per_load", 1.0, cache_level="L1"))
    figs.append(_fig("memory", "read", "fp64", 1, "bytes_per_s", 1e15, cache_level="L9"))
    return figs


def save_survey(store: Store, figures: list[Figure], host_key: str = HOST_KEY, hostname: str = HOSTNAME,
                status: str = "complete", minutes_ago: int = 0) -> str:
    """Store a survey run of the invented host; returns its UUID."""
    started = dt.datetime.now(dt.timezone.utc) - dt.timedelta(minutes=minutes_ago)
    record = RunRecord(host_key=host_key, hostname=hostname, fingerprint="0badc0de0badc0de",
                       host_facts={"caches": CACHES}, started_at=started, eaves_version="test",
                       params={}, kind="survey", status=status, ended_at=started, figures=figures)
    return store.save_run(record)


def temp_store(tmp_path: Path) -> Store:
    """A fresh SQLite store in a test's folder."""
    return Store("sqlite:///" + str(tmp_path / "t.db"))
