"""Fill a store with 5 000 synthetic survey runs and time `eaves trend` and `eaves diff` (target <= 1 s each).

Run: python tests/benchmarks/fill_store.py [--runs 5000] [--db URL]   (prints seconds)

The lab is invented test data: one long-lived machine with most of the history and a dozen
nodes with a few hundred nightly runs each; every run carries about as many figures as a quick
survey on a 2-thread host (memory ceilings per variant, the sweep, latency, strides, compute,
GEMM), each with 5 samples. Rows go in through SQLAlchemy Core in bulk, not one run at a time.
"""

from __future__ import annotations

import argparse
import datetime as dt
import statistics
import sys
import tempfile
import time
import uuid
from pathlib import Path

import numpy as np
from sqlalchemy import insert

from eaves.cli import main as eaves
from eaves.models import Host, Measurement, Run
from eaves.store import Store

T0 = dt.datetime(2025, 1, 1, 2, 0, tzinfo=dt.timezone.utc)
LEVELS = {"L1": (16 * 1024, 200e9), "L2": (512 * 1024, 100e9), "L3": (8 << 20, 50e9), "DRAM": (256 << 20, 20e9)}


def figure_rows(rng: np.random.Generator) -> list[dict]:
    """About 280 figures of one invented quick survey (bytes/s, ns and ops/s), 5 samples each."""
    rows = []

    def add(suite, kernel, unit, value, **kw):
        samples = (value * (1 + 0.01 * rng.standard_normal(5))).tolist()
        row = {"suite": suite, "kernel": kernel, "variant": kw.get("variant"), "dtype": kw.get("dtype", "fp64"),
               "threads": kw.get("threads", 1), "working_set_bytes": kw.get("ws"), "cache_level": kw.get("level"),
               "stride_elems": kw.get("stride"), "shape": kw.get("shape"), "bytes_per_s": None, "ops_per_s": None,
               "ns_per_load": None, "hz": None, "best": max(samples), "q1": min(samples), "q3": max(samples),
               "cv": 0.01, "samples": samples, "repetitions": 100, "min_seconds": 0.01, "extra": {}}
        row[unit] = statistics.median(samples)
        rows.append(row)

    for t in (1, 2):
        for level, (ws, bw) in LEVELS.items():
            for kernel in ("read", "write", "copy", "axpy"):
                for variant in ("vector", "loop", "stream"):
                    add("memory", kernel, "bytes_per_s", bw * t * (0.9 if variant == "loop" else 1.0),
                        threads=t, level=level, ws=ws, variant=variant)
        for kernel in ("read", "write", "copy", "axpy"):
            for e in range(12, 28):
                add("sweep", kernel, "bytes_per_s", 200e9 / (1 + (e - 12) / 2) * t, threads=t, ws=2 ** e)
        for stride in (1, 2, 4, 8):
            add("stride", "stride-read", "bytes_per_s", 20e9 / stride, threads=t, stride=stride, level="DRAM")
        add("scaling", "read", "bytes_per_s", 20e9 * t, threads=t, level="DRAM")
        for dtype, peak in (("fp64", 50e9), ("fp32", 100e9), ("fp16", 50e9), ("bf16", 50e9), ("int8", 400e9),
                            ("int16", 200e9)):
            add("compute", "madd-peak", "ops_per_s", peak * t, dtype=dtype, threads=t, variant="vector")
        for dtype in ("fp64", "fp32"):
            for shape in ("256x256x256", "1024x1024x1024", "1x1024x1024", "64x1024x1024", "512x512x512"):
                add("gemm", "matmul", "ops_per_s", 40e9 * t, dtype=dtype, threads=t, shape=shape)
        add("clock", "int-chain", "hz", 3e9, dtype="int64", threads=t)
    for level, (ws, _) in LEVELS.items():
        add("latency", "chase", "ns_per_load", {"L1": 1.2, "L2": 4, "L3": 14, "DRAM": 85}[level], dtype="int64",
            level=level, ws=ws)
    return rows


def fill(store: Store, runs: int) -> list[str]:
    """`runs` complete surveys: 52 % on one machine, the rest over 12 nodes; returns the host keys."""
    rng = np.random.default_rng(5)
    hosts = [("fennick-long-01", 0.52)] + [(f"fennick-node{i:02d}", 0.04) for i in range(1, 13)]
    keys = []
    with store._write_engine.begin() as conn:
        for name, share in hosts:
            key = f"{name}-0badc0de"
            keys.append(key)
            host_id = conn.execute(insert(Host.__table__).values(
                host_key=key, hostname=name, fingerprint="0badc0de0badc0de", facts={"model": "Invented CPU 3000"},
                first_seen=T0)).inserted_primary_key[0]
            n = int(round(runs * share))
            for start in range(0, n, 100):
                batch = range(start, min(n, start + 100))
                run_rows = [{"uuid": str(uuid.UUID(int=int(rng.integers(0, 2**62)) << 64 | i)), "host_id": host_id,
                             "kind": "survey", "started_at": T0 + dt.timedelta(days=i * 0.25), "ended_at": None,
                             "status": "complete", "eaves_version": "bench", "params": {}, "facts": {},
                             "tag": "nightly", "note": None, "git_describe": None, "ceilings_run_uuid": None}
                            for i in batch]
                ids = [conn.execute(insert(Run.__table__).values(**r)).inserted_primary_key[0] for r in run_rows]
                template = figure_rows(rng)
                measurements = []
                for run_id in ids:
                    noise = 1 + 0.01 * rng.standard_normal()
                    for r in template:
                        m = dict(r, run_id=run_id)
                        m["samples"] = [x * noise for x in r["samples"]]
                        measurements.append(m)
                conn.execute(insert(Measurement.__table__), measurements)
    return keys


def timed(argv: list[str], repeat: int = 3) -> float:
    """Best in-process wall time of `eaves ARGV` (output thrown away)."""
    import contextlib
    import io

    best = float("inf")
    for _ in range(repeat):
        with contextlib.redirect_stdout(io.StringIO()):
            t = time.perf_counter()
            code = eaves(argv)
            best = min(best, time.perf_counter() - t)
        assert code in (0, 1), f"eaves {' '.join(argv)} exited {code}"
    return best


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--runs", type=int, default=5000)
    parser.add_argument("--db", help="store URL (default: a temporary SQLite file)")
    parser.add_argument("--reuse", action="store_true", help="time a store filled before (--db) again")
    args = parser.parse_args()
    tmp = tempfile.TemporaryDirectory(prefix="eaves-fill-")
    url = args.db or f"sqlite:///{Path(tmp.name) / 'lab.db'}"
    store = Store(url)
    t = time.perf_counter()
    if args.reuse and store.run_uuids():
        keys = [h.host_key for h in sorted(store.hosts(), key=lambda h: -h.runs)]
        print(f"reusing {len(store.run_uuids())} runs on {len(keys)} hosts ({url})")
    else:
        keys = fill(store, args.runs)
        print(f"filled {len(store.run_uuids())} runs on {len(keys)} hosts in {time.perf_counter() - t:.1f} s ({url})")
    month_ago = (T0 + dt.timedelta(days=0.25 * int(args.runs * 0.52) - 30)).date().isoformat()
    long_host, node = keys[0], keys[1]
    cases = {
        f"trend --host {long_host} (newest 200 of {int(args.runs * 0.52)} runs)": ["trend", "--host", long_host],
        f"trend --host {long_host} --metric 'memory/read/*'": ["trend", "--host", long_host, "--metric", "memory/read/*"],
        f"trend --host {long_host} --since {month_ago} (last 30 days)": ["trend", "--host", long_host, "--since", month_ago],
        f"trend --host {node} (all {int(args.runs * 0.04)} runs)": ["trend", "--host", node],
        f"diff {long_host} {node} (hosts)": ["diff", long_host, node],
        f"diff 1 {args.runs // 2} (run ids)": ["diff", "1", str(args.runs // 2)],
    }
    for label, argv in cases.items():
        print(f"{timed([*argv, '--db', url]):6.3f} s  eaves {label}")
    sys.stdout.flush()


if __name__ == "__main__":
    main()
