"""How still do the figures hold: N quick surveys back to back, the C loops between them, and their spreads.

Run on a quiet host: python tests/benchmarks/reproducibility.py [--runs 10] [--db URL] [--no-c]
For every headline figure of `eaves survey --quick --only memory` (the level ceilings, latency,
strides, gather, scaling) it prints the run-to-run spread: the median absolute change between
consecutive runs and the coefficient of variation of the run medians. The C/OpenMP loops of
compare_memory.py run between the surveys at the same levels (the first sweep size of L1, the
survey's L2, L3 and DRAM working sets), 1 and all threads, so the host's own spread stands beside ours.
It also counts what `eaves diff` flags over the consecutive pairs, and checks that every level's
latency was taken at the same working set in every run.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
from collections import defaultdict

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)

from compare_memory import build, c_rate  # noqa: E402  (the C loops and their build)

from eaves.metrics import ceiling_figures  # noqa: E402
from eaves.store import Store  # noqa: E402
from eaves.threads import usable_cpus  # noqa: E402

KERNELS = ("read", "write", "copy", "axpy")


def survey(db: str, tag: str) -> str:
    """One quick memory survey as a user runs it (its own process); returns the run's UUID."""
    out = subprocess.run([sys.executable, "-m", "eaves", "survey", "--quick", "--only", "memory", "--db", db,
                          "--tag", tag, "--json", "-", "--charts", tempfile.gettempdir()],
                         capture_output=True, text=True, check=False)
    if out.returncode not in (0, 4):
        raise SystemExit(f"survey failed ({out.returncode}): {out.stderr[-2000:]}")
    return json.loads(out.stdout)["run"]["uuid"]


def level_sizes(run) -> dict[str, int]:
    """Working set of each level's ceiling (read, 1 thread) in a stored run."""
    return {f.cache_level: f.working_set_bytes for f in run.figures
            if f.suite == "memory" and f.kernel == "read" and f.threads == 1 and f.cache_level}


def spreads(series: dict) -> dict:
    """Per figure: the median absolute relative change between consecutive runs, and the CV of the medians."""
    out = {}
    for key, values in series.items():
        if len(values) < 2 or min(values) <= 0:
            continue
        changes = [abs(b / a - 1) for a, b in zip(values, values[1:])]
        out[key] = (statistics.median(changes), statistics.pstdev(values) / statistics.fmean(values))
    return out


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--runs", type=int, default=10)
    parser.add_argument("--db", default=f"sqlite:///{tempfile.gettempdir()}/eaves-repro.db")
    parser.add_argument("--no-c", action="store_true", help="skip the C loops")
    args = parser.parse_args()
    tag = f"repro-{os.getpid()}"
    threads = sorted({1, usable_cpus()})
    c_series: dict = defaultdict(list)
    uuids = []
    with tempfile.TemporaryDirectory() as tmp:
        exe = None if args.no_c else build(tmp)
        for i in range(args.runs):
            uuids.append(survey(args.db, tag))
            store = Store(args.db)
            run = store.load_run(store.resolve_run(uuids[-1]))
            store.close()
            sizes = level_sizes(run)
            print(f"run {i + 1}/{args.runs}: {uuids[-1][:8]}, level working sets "
                  + ", ".join(f"{k} {v >> 10} KiB" for k, v in sorted(sizes.items())), flush=True)
            if exe:
                for level in ("L1", "L2", "L3", "DRAM"):
                    if level not in sizes:
                        continue
                    for kernel in KERNELS:
                        for t in threads:
                            c_series[(level, kernel, t)].append(c_rate(exe, kernel, sizes[level], t))
    store = Store(args.db)
    runs = [store.load_run(store.resolve_run(u)) for u in uuids]
    series: dict = defaultdict(list)
    for run in runs:
        for key, f in ceiling_figures(run.figures).items():
            series[key].append(f.median)
    ours = spreads({k: v for k, v in series.items() if len(v) == len(runs)})
    theirs = spreads(c_series)
    print(f"\n{'figure':58} {'eaves med|chg|':>14} {'eaves CV':>9} {'C med|chg|':>11} {'C CV':>7}")
    common_ours, common_c = [], []
    for key, (chg, cv) in sorted(ours.items(), key=lambda kv: kv[0].sort_key()):
        c = theirs.get((key.cache_level, key.kernel, key.threads)) if key.suite == "memory" else None
        if c:
            common_ours.append(chg)
            common_c.append(c[0])
        print(f"{key.name()[:58]:58} {100 * chg:13.1f}% {100 * cv:8.1f}%"
              + (f" {100 * c[0]:10.1f}% {100 * c[1]:6.1f}%" if c else ""))
    print(f"\nall {len(ours)} figures: median of the run-to-run median |change| {100 * statistics.median(v[0] for v in ours.values()):.1f}%")
    for suite in sorted({k.suite for k in ours}):
        vals = [v[0] for k, v in ours.items() if k.suite == suite]
        print(f"  {suite:8} {len(vals):3} figures: {100 * statistics.median(vals):.1f}%")
    if common_ours:
        a, b = statistics.median(common_ours), statistics.median(common_c)
        print(f"figures both measure ({len(common_ours)}): eaves {100 * a:.1f}%, C {100 * b:.1f}%, ratio {a / b:.2f} "
              "(target <= 1.2)")
    chase = defaultdict(set)
    for run in runs:
        for f in run.figures:
            if f.suite == "latency":
                chase[f.cache_level].add(f.working_set_bytes)
    moving = {k: sorted(v) for k, v in chase.items() if len(v) > 1}
    print("latency working sets: " + ("the same in every run" if not moving else f"MOVED: {moving}"))
    flagged = total = 0
    for a, b in zip(uuids, uuids[1:]):
        out = subprocess.run([sys.executable, "-m", "eaves", "diff", a, b, "--json", "-", "--db", args.db],
                             capture_output=True, text=True)
        doc = json.loads(out.stdout)
        verdicts = [c.get("verdict") for c in doc["ceilings"] if c.get("verdict")]
        flagged += sum(v in ("gained", "lost") for v in verdicts)
        total += len(verdicts)
    if total:
        print(f"eaves diff over {len(uuids) - 1} consecutive pairs: {flagged} of {total} figures flagged "
              f"({100 * flagged / total:.1f}%, target <= 5%)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
